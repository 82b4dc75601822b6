package nn

import (
	"context"
	"fmt"
	"math/rand"
	"testing"

	"github.com/apportion/apportion/onnxlite"
)

type benchModel struct {
	name  string
	model func() *onnxlite.Model
}

var benchModels = []benchModel{
	{"mlp30-64-64-2", func() *onnxlite.Model { return mlpModel(30, 64, 2, 41) }},
	{"cnn1x28x28", func() *onnxlite.Model { return cnnModel(42) }},
}

func benchHead(b *testing.B, m *onnxlite.Model) *Head {
	nw, err := Compile(m, Options{DType: Float32})
	if err != nil {
		b.Fatal(err)
	}
	h, err := nw.Head(Selection{})
	if err != nil {
		b.Fatal(err)
	}
	return h
}

func BenchmarkForward(b *testing.B) {
	for _, bm := range benchModels {
		for _, n := range []int{1, 64} {
			b.Run(fmt.Sprintf("%s/batch=%d", bm.name, n), func(b *testing.B) {
				h := benchHead(b, bm.model())
				x := randomInput(rand.New(rand.NewSource(1)), n*prod(h.InputShape()))
				ctx := context.Background()
				if _, err := h.Forward(ctx, x, n); err != nil { // compile outside the timing
					b.Fatal(err)
				}
				b.ReportAllocs()
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

func BenchmarkGradient(b *testing.B) {
	for _, bm := range benchModels {
		for _, n := range []int{1, 64} {
			b.Run(fmt.Sprintf("%s/batch=%d", bm.name, n), func(b *testing.B) {
				h := benchHead(b, bm.model())
				x := randomInput(rand.New(rand.NewSource(1)), n*prod(h.InputShape()))
				target := make([]int, n)
				for i := range target {
					target[i] = i % h.OutputSize()
				}
				ctx := context.Background()
				if _, _, err := h.Gradient(ctx, x, n, target); err != nil {
					b.Fatal(err)
				}
				b.ReportAllocs()
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
