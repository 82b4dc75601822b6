package main

import (
	"fmt"
	"math"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// dense is one fully connected layer, y = x·W + b, with W stored [in, out]
// row-major: the layout of an ONNX Gemm B input with transB = 0.
type dense struct {
	In, Out int
	W, B    []float64
}

// mlp is the trained pumps network: standardisation, then Gemm → Relu →
// Gemm → Relu → Gemm → Softmax.
type mlp struct {
	Mean, Std []float64
	Layers    []dense
}

// standardise computes the per-feature mean and (population) standard
// deviation of x, n rows of d features.
func standardise(x []float64, n, d int) (mean, std []float64) {
	mean = make([]float64, d)
	std = make([]float64, d)
	for i := range n {
		for j := range d {
			mean[j] += x[i*d+j]
		}
	}
	for j := range d {
		mean[j] /= float64(n)
	}
	for i := range n {
		for j := range d {
			v := x[i*d+j] - mean[j]
			std[j] += v * v
		}
	}
	for j := range d {
		std[j] = math.Sqrt(std[j] / float64(n))
	}
	return mean, std
}

// glorot returns an in×out matrix drawn uniformly from ±sqrt(6/(in+out))
// (Glorot and Bengio 2010, eq. 16).
func glorot(rng *rand.Rand, in, out int) []float64 {
	a := math.Sqrt(6 / float64(in+out))
	w := make([]float64, in*out)
	for i := range w {
		w[i] = a * (2*rng.Float64() - 1)
	}
	return w
}

// trainConfig controls a training run.
type trainConfig struct {
	Epochs    int
	BatchSize int
	LearnRate float64
	Seed      uint64
}

// crossEntropy builds the mean cross-entropy of logits [n, k] against one-hot
// targets [n, k], with log-softmax written as logits − log Σ exp(logits).
func crossEntropy(logits, target *G.Node) (*G.Node, error) {
	e, err := G.Exp(logits)
	if err != nil {
		return nil, err
	}
	s, err := G.Sum(e, 1)
	if err != nil {
		return nil, err
	}
	lse, err := G.Log(s)
	if err != nil {
		return nil, err
	}
	logp, err := G.BroadcastSub(logits, lse, nil, []byte{1})
	if err != nil {
		return nil, err
	}
	prod, err := G.HadamardProd(target, logp)
	if err != nil {
		return nil, err
	}
	per, err := G.Sum(prod, 1)
	if err != nil {
		return nil, err
	}
	mean, err := G.Mean(per)
	if err != nil {
		return nil, err
	}
	return G.Neg(mean)
}

// trainMLP fits the pumps network to x (n rows of 8 standardised-in-graph
// features) and labels with Adam on mini-batches, and returns its weights.
func trainMLP(x []float64, labels []int, n int, cfg trainConfig) (*mlp, error) {
	const d, k = 8, 3
	sizes := []int{d, 16, 16, k}
	rng := rand.New(rand.NewPCG(cfg.Seed, 0x6d6c70)) // stream "mlp"
	mean, std := standardise(x, n, d)

	g := G.NewGraph()
	bs := cfg.BatchSize
	xin := G.NewMatrix(g, tensor.Float64, G.WithShape(bs, d), G.WithName("x"))
	yin := G.NewMatrix(g, tensor.Float64, G.WithShape(bs, k), G.WithName("y"))
	var ws, bsn []*G.Node
	h := xin
	for l := 0; l+1 < len(sizes); l++ {
		in, out := sizes[l], sizes[l+1]
		w := G.NewMatrix(g, tensor.Float64, G.WithShape(in, out), G.WithName(fmt.Sprintf("w%d", l)),
			G.WithValue(tensor.New(tensor.WithShape(in, out), tensor.WithBacking(glorot(rng, in, out)))))
		b := G.NewVector(g, tensor.Float64, G.WithShape(out), G.WithName(fmt.Sprintf("b%d", l)),
			G.WithValue(tensor.New(tensor.WithShape(out), tensor.WithBacking(make([]float64, out)))))
		ws, bsn = append(ws, w), append(bsn, b)
		z, err := G.Mul(h, w)
		if err != nil {
			return nil, err
		}
		if z, err = G.BroadcastAdd(z, b, nil, []byte{0}); err != nil {
			return nil, err
		}
		if l+2 < len(sizes) {
			if z, err = G.Rectify(z); err != nil {
				return nil, err
			}
		}
		h = z
	}
	cost, err := crossEntropy(h, yin)
	if err != nil {
		return nil, err
	}
	learn := append(append(G.Nodes{}, ws...), bsn...)
	if _, err := G.Grad(cost, learn...); err != nil {
		return nil, err
	}
	vm := G.NewTapeMachine(g, G.BindDualValues(learn...))
	defer vm.Close()
	solver := G.NewAdamSolver(G.WithLearnRate(cfg.LearnRate))

	xb := make([]float64, bs*d)
	yb := make([]float64, bs*k)
	perm := make([]int, n)
	for i := range perm {
		perm[i] = i
	}
	for range cfg.Epochs {
		rng.Shuffle(n, func(i, j int) { perm[i], perm[j] = perm[j], perm[i] })
		for start := 0; start+bs <= n; start += bs {
			clear(yb)
			for r := range bs {
				src := perm[start+r]
				for j := range d {
					xb[r*d+j] = (x[src*d+j] - mean[j]) / std[j]
				}
				yb[r*k+labels[src]] = 1
			}
			if err := G.Let(xin, tensor.New(tensor.WithShape(bs, d), tensor.WithBacking(xb))); err != nil {
				return nil, err
			}
			if err := G.Let(yin, tensor.New(tensor.WithShape(bs, k), tensor.WithBacking(yb))); err != nil {
				return nil, err
			}
			if err := vm.RunAll(); err != nil {
				return nil, err
			}
			if err := solver.Step(G.NodesToValueGrads(learn)); err != nil {
				return nil, err
			}
			vm.Reset()
		}
	}
	m := &mlp{Mean: mean, Std: std}
	for l := range ws {
		m.Layers = append(m.Layers, dense{
			In: sizes[l], Out: sizes[l+1],
			W: append([]float64(nil), ws[l].Value().Data().([]float64)...),
			B: append([]float64(nil), bsn[l].Value().Data().([]float64)...),
		})
	}
	return m, nil
}

// predict returns the argmax class of one raw (unstandardised) row, computed
// in float32 like the exported model.
func (m *mlp) predict(x []float64) int {
	return argmax32(m.logits(x))
}

// logits returns the network's outputs before the softmax for one raw row,
// in float32 like the exported model.
func (m *mlp) logits(x []float64) []float32 {
	h := make([]float32, len(x))
	for j := range x {
		h[j] = (float32(x[j]) - float32(m.Mean[j])) / float32(m.Std[j])
	}
	for l, L := range m.Layers {
		h = L.forward(h, l+1 < len(m.Layers))
	}
	return h
}

// probabilities returns the class probabilities of one raw row, softmax(z)_k
// = exp(z_k − max z) / Σ_j exp(z_j − max z) of the logits z.
func (m *mlp) probabilities(x []float64) []float64 {
	z := m.logits(x)
	top := z[argmax32(z)]
	p := make([]float64, len(z))
	sum := 0.0
	for k, v := range z {
		p[k] = math.Exp(float64(v - top))
		sum += p[k]
	}
	for k := range p {
		p[k] /= sum
	}
	return p
}

// argmax32 returns the index of the largest element (the first on ties).
func argmax32(v []float32) int {
	best := 0
	for i := range v {
		if v[i] > v[best] {
			best = i
		}
	}
	return best
}
