package nn

import (
	"context"
	"fmt"
	"math"
	"path/filepath"
	"testing"

	"github.com/apportion/apportion/onnxlite"
)

// splitModels are the bench/models networks (written by go run ./bench/zoo).
var splitModels = []string{"mlp-s", "mlp-m", "cnn-s", "cnn-m"}

// splitHead compiles bench/models/name.onnx with opts and returns its head
// on the first output.
func splitHead(tb testing.TB, name string, opts Options) *Head {
	tb.Helper()
	m, err := onnxlite.DecodeFile(filepath.Join("..", "bench", "models", name+".onnx"), onnxlite.DecodeOptions{})
	if err != nil {
		tb.Fatal(err)
	}
	nw, err := Compile(m, opts)
	if err != nil {
		tb.Fatal(err)
	}
	h, err := nw.Head(Selection{})
	if err != nil {
		tb.Fatal(err)
	}
	return h
}

// splitInput is n samples of 0.5·sin(0.37·i + 0.1) (the bench/zoo input
// formula), sample k scaled by (k+1)/n so samples differ.
func splitInput(h *Head, n int) []float64 {
	size := 1
	for _, d := range h.InputShape() {
		size *= d
	}
	x := make([]float64, n*size)
	for k := 0; k < n; k++ {
		for i := 0; i < size; i++ {
			x[k*size+i] = 0.5 * math.Sin(0.37*float64(i)+0.1) * float64(k+1) / float64(n)
		}
	}
	return x
}

// BenchmarkSplitGradient times one Head.Gradient call on the bench models
// at several batch sizes with Parallel 1 and 2; the split thresholds in
// split_run.go come from it (run at GOMAXPROCS=2):
// go test ./nn -run '^$' -bench SplitGradient -cpu 2
func BenchmarkSplitGradient(b *testing.B) {
	ctx := context.Background()
	for _, name := range splitModels {
		for _, par := range []int{1, 2} {
			h := splitHead(b, name, Options{Parallel: par})
			h.nw.splitMinFLOPs = 0 // split every batch, to measure where it pays
			for _, n := range []int{2, 4, 16, 32, 64} {
				x := splitInput(h, n)
				target := make([]int, n)
				b.Run(fmt.Sprintf("%s/n%d/p%d", name, n, par), func(b *testing.B) {
					if _, _, err := h.Gradient(ctx, x, n, target); err != nil {
						b.Fatal(err)
					}
					b.ResetTimer()
					for i := 0; i < b.N; i++ {
						if _, _, err := h.Gradient(ctx, x, n, target); err != nil {
							b.Fatal(err)
						}
					}
				})
			}
		}
	}
}

// BenchmarkSplitForward times one Head.Forward call of 1024 samples on the
// bench models with Parallel 1 and 2 (run at GOMAXPROCS=2):
// go test ./nn -run '^$' -bench SplitForward -cpu 2
func BenchmarkSplitForward(b *testing.B) {
	ctx := context.Background()
	for _, name := range splitModels {
		for _, par := range []int{1, 2} {
			h := splitHead(b, name, Options{Parallel: par})
			const n = 1024
			x := splitInput(h, n)
			b.Run(fmt.Sprintf("%s/n%d/p%d", name, n, par), func(b *testing.B) {
				if _, err := h.Forward(ctx, x, n); err != nil {
					b.Fatal(err)
				}
				b.ResetTimer()
				for i := 0; i < b.N; i++ {
					if _, err := h.Forward(ctx, x, n); err != nil {
						b.Fatal(err)
					}
				}
			})
		}
	}
}
