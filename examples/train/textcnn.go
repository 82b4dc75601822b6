package main

import (
	"fmt"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// textCNN is the trained tickets network: token ids → embedding → 1-D
// convolution (kernel 3, zero padding 1) → Relu → mean over the positions
// → dense → softmax.
type textCNN struct {
	Vocab, Embed, Channels int
	Emb                    []float64 // [Vocab, Embed]
	Conv                   []float64 // [Channels, Embed, 3], ONNX's Conv layout
	ConvB                  []float64 // [Channels]
	FC                     dense     // Channels → classes
}

// trainTextCNN fits the tickets network to notes (token ids, ticketLen
// per note) with Adam on mini-batches. Each batch's lookups are products
// with one-hot matrices: X_k [batch·len, vocab] picks the token k − 1
// positions away (a zero row past either end, the convolution's zero
// padding), so that X_k·E·W_k summed over k is the convolution of the
// embedded note.
func trainTextCNN(ids [][]int, labels []int, vocab int, cfg trainConfig) (*textCNN, error) {
	const k = 3
	L, E, C, classes := ticketLen, ticketEmbed, ticketChannels, len(ticketClasses)
	rng := rand.New(rand.NewPCG(cfg.Seed, 0x74636e6e)) // stream "tcnn"
	bs := cfg.BatchSize
	rows := bs * L
	g := G.NewGraph()
	param := func(name string, shape []int, v []float64) *G.Node {
		return G.NewMatrix(g, tensor.Float64, G.WithShape(shape...), G.WithName(name),
			G.WithValue(tensor.New(tensor.WithShape(shape...), tensor.WithBacking(v))))
	}
	emb := make([]float64, vocab*E)
	for i := range emb {
		emb[i] = 0.3 * rng.NormFloat64()
	}
	embN := param("emb", []int{vocab, E}, emb)
	var xs, ws []*G.Node
	var conv *G.Node
	for j := range k {
		x := G.NewMatrix(g, tensor.Float64, G.WithShape(rows, vocab), G.WithName(fmt.Sprintf("x%d", j)))
		// Glorot and Bengio 2010, eq. 16, with the fan-in of the whole
		// kernel, E·k.
		wk := glorot(rng, E*k, C)[:E*C]
		w := param(fmt.Sprintf("w%d", j), []int{E, C}, wk)
		e, err := G.Mul(x, embN)
		if err != nil {
			return nil, err
		}
		z, err := G.Mul(e, w)
		if err != nil {
			return nil, err
		}
		if conv == nil {
			conv = z
		} else if conv, err = G.Add(conv, z); err != nil {
			return nil, err
		}
		xs, ws = append(xs, x), append(ws, w)
	}
	cb := G.NewVector(g, tensor.Float64, G.WithShape(C), G.WithName("cb"),
		G.WithValue(tensor.New(tensor.WithShape(C), tensor.WithBacking(make([]float64, C)))))
	h, err := G.BroadcastAdd(conv, cb, nil, []byte{0})
	if err != nil {
		return nil, err
	}
	if h, err = G.Rectify(h); err != nil {
		return nil, err
	}
	// The mean over each note's positions, as a product with a constant.
	pool := make([]float64, bs*rows)
	for r := range bs {
		for p := range L {
			pool[r*rows+r*L+p] = 1 / float64(L)
		}
	}
	poolN := G.NewMatrix(g, tensor.Float64, G.WithShape(bs, rows), G.WithName("pool"),
		G.WithValue(tensor.New(tensor.WithShape(bs, rows), tensor.WithBacking(pool))))
	if h, err = G.Mul(poolN, h); err != nil {
		return nil, err
	}
	fw := param("fw", []int{C, classes}, glorot(rng, C, classes))
	fb := G.NewVector(g, tensor.Float64, G.WithShape(classes), G.WithName("fb"),
		G.WithValue(tensor.New(tensor.WithShape(classes), tensor.WithBacking(make([]float64, classes)))))
	logits, err := G.Mul(h, fw)
	if err != nil {
		return nil, err
	}
	if logits, err = G.BroadcastAdd(logits, fb, nil, []byte{0}); err != nil {
		return nil, err
	}
	yin := G.NewMatrix(g, tensor.Float64, G.WithShape(bs, classes), G.WithName("y"))
	cost, err := crossEntropy(logits, yin)
	if err != nil {
		return nil, err
	}
	learn := append(G.Nodes{embN, cb, fw, fb}, ws...)
	if _, err := G.Grad(cost, learn...); err != nil {
		return nil, err
	}
	vm := G.NewTapeMachine(g, G.BindDualValues(learn...))
	defer vm.Close()
	solver := G.NewAdamSolver(G.WithLearnRate(cfg.LearnRate))

	n := len(ids)
	perm := make([]int, n)
	for i := range perm {
		perm[i] = i
	}
	xb := make([][]float64, k)
	for j := range xb {
		xb[j] = make([]float64, rows*vocab)
	}
	yb := make([]float64, bs*classes)
	for range cfg.Epochs {
		rng.Shuffle(n, func(i, j int) { perm[i], perm[j] = perm[j], perm[i] })
		for start := 0; start+bs <= n; start += bs {
			clear(yb)
			for j := range xb {
				clear(xb[j])
			}
			for r := range bs {
				note := ids[perm[start+r]]
				for p := range L {
					for j := range k {
						if q := p + j - 1; q >= 0 && q < L {
							xb[j][(r*L+p)*vocab+note[q]] = 1
						}
					}
				}
				yb[r*classes+labels[perm[start+r]]] = 1
			}
			for j, x := range xs {
				if err := G.Let(x, tensor.New(tensor.WithShape(rows, vocab), tensor.WithBacking(xb[j]))); err != nil {
					return nil, err
				}
			}
			if err := G.Let(yin, tensor.New(tensor.WithShape(bs, classes), tensor.WithBacking(yb))); err != nil {
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
	m := &textCNN{Vocab: vocab, Embed: E, Channels: C, Emb: data(embN), ConvB: data(cb),
		FC: dense{In: C, Out: classes, W: data(fw), B: data(fb)}}
	m.Conv = make([]float64, C*E*k)
	for j, w := range ws {
		v := data(w)
		for e := range E {
			for c := range C {
				m.Conv[(c*E+e)*k+j] = v[e*C+c]
			}
		}
	}
	return m, nil
}

// logits returns the network's outputs before the softmax for one note,
// in float32 like the exported model.
func (m *textCNN) logits(ids []int) []float32 {
	L, E, C := len(ids), m.Embed, m.Channels
	pooled := make([]float32, C)
	for p := range L {
		for c := range C {
			s := float32(m.ConvB[c])
			for j := range 3 {
				q := p + j - 1
				if q < 0 || q >= L {
					continue
				}
				for e := range E {
					s += float32(m.Emb[ids[q]*E+e]) * float32(m.Conv[(c*E+e)*3+j])
				}
			}
			pooled[c] += max(s, 0)
		}
	}
	for c := range pooled {
		pooled[c] /= float32(L)
	}
	return m.FC.forward(pooled, false)
}

// predict returns the argmax class of one note.
func (m *textCNN) predict(ids []int) int { return argmax32(m.logits(ids)) }
