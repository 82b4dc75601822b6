package main

import (
	"math"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// conv is one 3×3, stride 1, pad 1 convolution with weights [out, in, 3, 3]
// row-major: the layout of ONNX Conv's W input.
type conv struct {
	In, Out int
	W, B    []float64
}

// cnn is the trained welds network: Conv 1→8 → Relu → MaxPool 2 → Conv
// 8→16 → Relu → MaxPool 2 → Flatten → Gemm 1024→32 → Relu → Gemm 32→2 →
// Softmax.
type cnn struct {
	Conv1, Conv2 conv
	FC1, FC2     dense
}

// heConv returns out×in×3×3 weights drawn from N(0, 2/(9·in))
// (He et al. 2015, eq. 10).
func heConv(rng *rand.Rand, in, out int) []float64 {
	s := math.Sqrt(2 / float64(9*in))
	w := make([]float64, out*in*9)
	for i := range w {
		w[i] = s * rng.NormFloat64()
	}
	return w
}

// trainCNN fits the welds network to patches with Adam on mini-batches.
func trainCNN(ps []weldPatch, cfg trainConfig) (*cnn, error) {
	rng := rand.New(rand.NewPCG(cfg.Seed, 0x636e6e)) // stream "cnn"
	bs := cfg.BatchSize
	g := G.NewGraph()
	val := func(data []float64, shape ...int) G.NodeConsOpt {
		return G.WithValue(tensor.New(tensor.WithShape(shape...), tensor.WithBacking(data)))
	}
	xin := G.NewTensor(g, tensor.Float64, 4, G.WithShape(bs, 1, weldSize, weldSize), G.WithName("x"))
	yin := G.NewMatrix(g, tensor.Float64, G.WithShape(bs, 2), G.WithName("y"))
	k1 := G.NewTensor(g, tensor.Float64, 4, G.WithShape(8, 1, 3, 3), G.WithName("k1"), val(heConv(rng, 1, 8), 8, 1, 3, 3))
	c1 := G.NewTensor(g, tensor.Float64, 4, G.WithShape(1, 8, 1, 1), G.WithName("c1"), val(make([]float64, 8), 1, 8, 1, 1))
	k2 := G.NewTensor(g, tensor.Float64, 4, G.WithShape(16, 8, 3, 3), G.WithName("k2"), val(heConv(rng, 8, 16), 16, 8, 3, 3))
	c2 := G.NewTensor(g, tensor.Float64, 4, G.WithShape(1, 16, 1, 1), G.WithName("c2"), val(make([]float64, 16), 1, 16, 1, 1))
	w3 := G.NewMatrix(g, tensor.Float64, G.WithShape(1024, 32), G.WithName("w3"), val(glorot(rng, 1024, 32), 1024, 32))
	b3 := G.NewVector(g, tensor.Float64, G.WithShape(32), G.WithName("b3"), val(make([]float64, 32), 32))
	w4 := G.NewMatrix(g, tensor.Float64, G.WithShape(32, 2), G.WithName("w4"), val(glorot(rng, 32, 2), 32, 2))
	b4 := G.NewVector(g, tensor.Float64, G.WithShape(2), G.WithName("b4"), val(make([]float64, 2), 2))
	learn := G.Nodes{k1, c1, k2, c2, w3, b3, w4, b4}

	var err error
	must := func(n *G.Node, e error) *G.Node {
		if e != nil && err == nil {
			err = e
		}
		return n
	}
	block := func(x, k, c *G.Node) *G.Node {
		if err != nil {
			return nil
		}
		h := must(G.Conv2d(x, k, tensor.Shape{3, 3}, []int{1, 1}, []int{1, 1}, []int{1, 1}))
		if err != nil {
			return nil
		}
		h = must(G.BroadcastAdd(h, c, nil, []byte{0, 2, 3}))
		if err != nil {
			return nil
		}
		h = must(G.Rectify(h))
		if err != nil {
			return nil
		}
		return must(G.MaxPool2D(h, tensor.Shape{2, 2}, []int{0, 0}, []int{2, 2}))
	}
	h := block(xin, k1, c1)
	h = block(h, k2, c2)
	if err != nil {
		return nil, err
	}
	h = must(G.Reshape(h, tensor.Shape{bs, 1024}))
	if err != nil {
		return nil, err
	}
	h = must(G.BroadcastAdd(must(G.Mul(h, w3)), b3, nil, []byte{0}))
	if err != nil {
		return nil, err
	}
	h = must(G.Rectify(h))
	if err != nil {
		return nil, err
	}
	h = must(G.BroadcastAdd(must(G.Mul(h, w4)), b4, nil, []byte{0}))
	if err != nil {
		return nil, err
	}
	cost, err := crossEntropy(h, yin)
	if err != nil {
		return nil, err
	}
	if _, err := G.Grad(cost, learn...); err != nil {
		return nil, err
	}
	vm := G.NewTapeMachine(g, G.BindDualValues(learn...))
	defer vm.Close()
	solver := G.NewAdamSolver(G.WithLearnRate(cfg.LearnRate))

	n := len(ps)
	xb := make([]float64, bs*weldPixels)
	yb := make([]float64, bs*2)
	perm := make([]int, n)
	for i := range perm {
		perm[i] = i
	}
	for range cfg.Epochs {
		rng.Shuffle(n, func(i, j int) { perm[i], perm[j] = perm[j], perm[i] })
		for start := 0; start+bs <= n; start += bs {
			clear(yb)
			for r := range bs {
				p := &ps[perm[start+r]]
				for i, v := range p.Pix {
					xb[r*weldPixels+i] = float64(v)
				}
				yb[r*2+p.Label] = 1
			}
			if err := G.Let(xin, tensor.New(tensor.WithShape(bs, 1, weldSize, weldSize), tensor.WithBacking(xb))); err != nil {
				return nil, err
			}
			if err := G.Let(yin, tensor.New(tensor.WithShape(bs, 2), tensor.WithBacking(yb))); err != nil {
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
	data := func(n *G.Node) []float64 { return append([]float64(nil), n.Value().Data().([]float64)...) }
	return &cnn{
		Conv1: conv{In: 1, Out: 8, W: data(k1), B: data(c1)},
		Conv2: conv{In: 8, Out: 16, W: data(k2), B: data(c2)},
		FC1:   dense{In: 1024, Out: 32, W: data(w3), B: data(b3)},
		FC2:   dense{In: 32, Out: 2, W: data(w4), B: data(b4)},
	}, nil
}

// forwardRelu applies c with pad 1 to x [in, s, s] and returns relu'd [out, s, s].
func (c conv) forwardRelu(x []float32, s int) []float32 {
	out := make([]float32, c.Out*s*s)
	for o := range c.Out {
		for y := range s {
			for xx := range s {
				sum := float32(c.B[o])
				for i := range c.In {
					for ky := range 3 {
						iy := y + ky - 1
						if iy < 0 || iy >= s {
							continue
						}
						for kx := range 3 {
							ix := xx + kx - 1
							if ix < 0 || ix >= s {
								continue
							}
							sum += x[(i*s+iy)*s+ix] * float32(c.W[((o*c.In+i)*3+ky)*3+kx])
						}
					}
				}
				out[(o*s+y)*s+xx] = max(sum, 0)
			}
		}
	}
	return out
}

// maxPool2 is a 2×2, stride 2 max pool of x [ch, s, s].
func maxPool2(x []float32, ch, s int) []float32 {
	h := s / 2
	out := make([]float32, ch*h*h)
	for c := range ch {
		for y := range h {
			for xx := range h {
				i := (c*s+2*y)*s + 2*xx
				out[(c*h+y)*h+xx] = max(x[i], x[i+1], x[i+s], x[i+s+1])
			}
		}
	}
	return out
}

// forward computes x·W + b, with a Relu when relu is set.
func (d dense) forward(x []float32, relu bool) []float32 {
	out := make([]float32, d.Out)
	for o := range d.Out {
		s := float32(d.B[o])
		for i := range d.In {
			s += x[i] * float32(d.W[i*d.Out+o])
		}
		if relu && s < 0 {
			s = 0
		}
		out[o] = s
	}
	return out
}

// predict returns the argmax class of one patch, computed in float32 like
// the exported model.
func (m *cnn) predict(p *weldPatch) int {
	h := m.Conv1.forwardRelu(p.Pix[:], weldSize)
	h = maxPool2(h, 8, weldSize)
	h = m.Conv2.forwardRelu(h, weldSize/2)
	h = maxPool2(h, 16, weldSize/2)
	h = m.FC1.forward(h, true)
	return argmax32(m.FC2.forward(h, false))
}
