package bench

import (
	"context"
	"fmt"
	"testing"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/cpupeak"
	"github.com/apportion/apportion/nn"
)

func zooHead(tb testing.TB, s Spec) *nn.Head {
	tb.Helper()
	m, err := Build(s)
	if err != nil {
		tb.Fatal(err)
	}
	nw, err := nn.Compile(m, nn.Options{})
	if err != nil {
		tb.Fatal(err)
	}
	h, err := nw.Head(nn.Selection{})
	if err != nil {
		tb.Fatal(err)
	}
	return h
}

// zooCall is one row of bench/compare on the Go side.
type zooCall struct {
	name string
	f    func() error
}

// zooCalls returns the rows of bench/compare for head h on sample x: the
// single-sample calls and the batched ones (integrated gradients with 64
// points, SmoothGrad with 50 copies: one batch of 64 or 50 samples per call).
func zooCalls(b *testing.B, h *nn.Head, x []float64) (single, batched []zooCall) {
	ctx := context.Background()
	out, err := h.Forward(ctx, x, 1)
	if err != nil {
		b.Fatal(err)
	}
	t := gradattr.Top(out)
	single = []zooCall{
		{"predict", func() error { _, err := h.Forward(ctx, x, 1); return err }},
		{"gradient", func() error { _, err := gradattr.Gradient(ctx, h, x, t, gradattr.GradientOptions{}); return err }},
	}
	batched = []zooCall{
		{"ig64", func() error {
			_, err := gradattr.IntegratedGradients(ctx, h, x, t, gradattr.IGOptions{Points: 64})
			return err
		}},
		{"smoothgrad50", func() error {
			_, err := gradattr.SmoothGrad(ctx, h, x, t, gradattr.SmoothGradOptions{Samples: 50})
			return err
		}},
	}
	return single, batched
}

// runZooCalls times each call as a sub-benchmark named prefix/name, after one
// untimed call that compiles and warms the programs.
func runZooCalls(b *testing.B, prefix string, calls []zooCall) {
	for _, c := range calls {
		b.Run(prefix+"/"+c.name, func(b *testing.B) {
			if err := c.f(); err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				if err := c.f(); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// BenchmarkZoo times the rows of bench/compare on the Go side alone:
// go test ./bench -run '^$' -bench Zoo -benchmem
func BenchmarkZoo(b *testing.B) {
	for _, s := range Zoo {
		single, batched := zooCalls(b, zooHead(b, s), Input(s, 1))
		runZooCalls(b, s.Name, append(single, batched...))
	}
}

// BenchmarkZooParallel times the batched rows of bench/compare with
// nn.Options.Parallel 1 and 2, on the two larger zoo models:
// go test ./bench -run '^$' -bench ZooParallel -cpu 2
func BenchmarkZooParallel(b *testing.B) {
	for _, name := range []string{"mlp-m", "cnn-m"} {
		s, err := Lookup(name)
		if err != nil {
			b.Fatal(err)
		}
		m, err := Build(s)
		if err != nil {
			b.Fatal(err)
		}
		for _, par := range []int{1, 2} {
			nw, err := nn.Compile(m, nn.Options{Parallel: par})
			if err != nil {
				b.Fatal(err)
			}
			h, err := nw.Head(nn.Selection{})
			if err != nil {
				b.Fatal(err)
			}
			_, batched := zooCalls(b, h, Input(s, 1))
			for i := range batched {
				batched[i].name = fmt.Sprintf("%s/parallel%d", batched[i].name, par)
			}
			runZooCalls(b, name, batched)
		}
	}
}

// BenchmarkZooGradient times nn.Head.Gradient at batches of 64 and 256 (the
// passes integrated gradients and SmoothGrad make) on each zoo model, and
// reports GFLOP/s of wall-clock and of thread CPU time (cpupeak.Bench; the
// call runs on the benchmark's goroutine): 2·MACs of Gemm and Conv from the
// graph, ×2 for the forward and the input-gradient pass, as bench/compare
// counts them:
// go test ./bench -run '^$' -bench ZooGradient -cpu 1
func BenchmarkZooGradient(b *testing.B) {
	ctx := context.Background()
	for _, s := range Zoo {
		m, err := Build(s)
		if err != nil {
			b.Fatal(err)
		}
		flops, err := FLOPs(m, s.Input)
		if err != nil {
			b.Fatal(err)
		}
		h := zooHead(b, s)
		for _, n := range []int{64, 256} {
			x := Input(s, n)
			target := make([]int, n)
			for i := range target {
				target[i] = i % s.Outputs
			}
			b.Run(fmt.Sprintf("%s/batch%d", s.Name, n), func(b *testing.B) {
				if _, _, err := h.Gradient(ctx, x, n, target); err != nil {
					b.Fatal(err)
				}
				b.ReportAllocs()
				cpupeak.Bench(b, 2*float64(flops)*float64(n), func() {
					if _, _, err := h.Gradient(ctx, x, n, target); err != nil {
						b.Fatal(err)
					}
				})
			})
		}
	}
}
