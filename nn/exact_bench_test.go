package nn

import (
	"context"
	"math"
	"path/filepath"
	"testing"

	"github.com/apportion/apportion/onnxlite"
)

// BenchmarkIntegratePath integrates the zoo models' gradients exactly from
// the zero baseline to the benchmark input (bench.Input's first row,
// 0.5·sin(0.37·i + 0.1)), in float32.
func BenchmarkIntegratePath(b *testing.B) {
	for _, c := range []struct {
		name string
		size int
	}{{"mlp-s", 30}, {"mlp-m", 100}, {"cnn-s", 784}, {"cnn-m", 3072}} {
		b.Run(c.name, func(b *testing.B) {
			m, err := onnxlite.DecodeFile(filepath.Join("../bench/models", c.name+".onnx"), onnxlite.DecodeOptions{})
			if err != nil {
				b.Fatal(err)
			}
			h, err := mustHead(m, Float32)
			if err != nil {
				b.Fatal(err)
			}
			x := benchInput(c.size)
			zero := make([]float64, c.size)
			out, err := h.Forward(context.Background(), x, 1)
			if err != nil {
				b.Fatal(err)
			}
			target := 0
			for i, v := range out {
				if v > out[target] {
					target = i
				}
			}
			var pieces int
			for b.Loop() {
				if _, pieces, err = h.IntegratePath(context.Background(), zero, x, target, 0); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(pieces), "pieces")
		})
	}
}

// benchInput is bench.Input's first sample of n values: 0.5·sin(0.37·i + 0.1).
func benchInput(n int) []float64 {
	x := make([]float64, n)
	for i := range x {
		x[i] = 0.5 * math.Sin(0.37*float64(i)+0.1)
	}
	return x
}
