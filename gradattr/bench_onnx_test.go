package gradattr_test

import (
	"bytes"
	"cmp"
	"context"
	"fmt"
	"testing"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// Benchmarks of the attribution methods on compiled ONNX models, one sample
// per operation, on the float32 engine (nn's default):
//
//	go test ./gradattr -run '^$' -bench ONNX -benchmem
//
// The demo heads are the models' graph outputs (class probabilities).

// benchDemo compiles a demo scenario's model on the float32 engine and
// returns its output head and sample.
func benchDemo(b *testing.B, scenario string) (*nn.Head, []float64) {
	b.Helper()
	s, err := demo.Get(scenario)
	if err != nil {
		b.Fatal(err)
	}
	m, err := onnxlite.Decode(bytes.NewReader(s.Model), onnxlite.DecodeOptions{})
	if err != nil {
		b.Fatal(err)
	}
	nw, err := nn.Compile(m, nn.Options{})
	if err != nil {
		b.Fatal(err)
	}
	h, err := nw.Head(nn.Selection{})
	if err != nil {
		b.Fatal(err)
	}
	x, err := flattenJSON(s.Sample)
	if err != nil {
		b.Fatal(err)
	}
	return h, x
}

// mlp30 is an MLP 30 → 64 → 64 → 2 (Gemm, Relu, Gemm, Relu, Gemm) with
// seeded weights, float32, built as ONNX IR.
func mlp30(b *testing.B) (*nn.Head, []float64) {
	b.Helper()
	ir := newIR(b, "mlp30", onnxlite.Float, "x", []int64{30}, "y", []int64{2})
	h := "x"
	for l, width := range [][2]int{{30, 64}, {64, 64}, {64, 2}} {
		d := newDense(uint64(100+10*l), width[0], width[1])
		out := fmt.Sprintf("dense%d", l)
		if l == 2 {
			out = "y"
		}
		h = ir.node("Gemm", out, []string{h,
			ir.init(fmt.Sprintf("W%d", l), []int64{int64(d.out), int64(d.in)}, d.w),
			ir.init(fmt.Sprintf("b%d", l), []int64{int64(d.out)}, d.b)}, attrInt("transB", 1))
		if l < 2 {
			h = ir.node("Relu", fmt.Sprintf("relu%d", l), []string{h})
		}
	}
	return ir.head(nn.Float32), uniformRows(1, 1, 30, -1, 1)[0]
}

// benchIG64 times integrated gradients with 64 Gauss–Legendre points from
// the zero baseline, after one warm-up call that compiles the programs.
func benchIG64(b *testing.B, h *nn.Head, x []float64) {
	ctx := context.Background()
	opt := gradattr.IGOptions{Points: 64, Rule: gradattr.RuleGaussLegendre}
	if _, err := gradattr.IntegratedGradients(ctx, h, x, gradattr.TargetTop, opt); err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	for b.Loop() {
		if _, err := gradattr.IntegratedGradients(ctx, h, x, gradattr.TargetTop, opt); err != nil {
			b.Fatal(err)
		}
	}
}

// benchSmoothGrad50 times SmoothGrad with 50 noisy copies, after a
// warm-up call.
func benchSmoothGrad50(b *testing.B, h *nn.Head, x []float64) {
	ctx := context.Background()
	opt := gradattr.SmoothGradOptions{Samples: 50}
	if _, err := gradattr.SmoothGrad(ctx, h, x, gradattr.TargetTop, opt); err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	for b.Loop() {
		if _, err := gradattr.SmoothGrad(ctx, h, x, gradattr.TargetTop, opt); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkONNXIG64(b *testing.B) {
	for _, scenario := range []string{"pumps", "welds"} {
		b.Run(scenario, func(b *testing.B) {
			h, x := benchDemo(b, scenario)
			benchIG64(b, h, x)
		})
	}
}

func BenchmarkONNXSmoothGrad50(b *testing.B) {
	for _, scenario := range []string{"pumps", "welds"} {
		b.Run(scenario, func(b *testing.B) {
			h, x := benchDemo(b, scenario)
			benchSmoothGrad50(b, h, x)
		})
	}
}

func BenchmarkONNXIG64_MLP30(b *testing.B) {
	h, x := mlp30(b)
	benchIG64(b, h, x)
}

// mlp12 is an MLP 12 → 64 → 64 → 3 (Gemm, Relu, Gemm, Relu, Gemm,
// Softmax) with seeded weights, float32: twelve features, the most the
// automatic Shapley estimator enumerates exactly. It returns the head, a
// sample and 100 reference rows.
func mlp12(b *testing.B) (*nn.Head, []float64, [][]float64) {
	b.Helper()
	ir := newIR(b, "mlp12", onnxlite.Float, "x", []int64{12}, "y", []int64{3})
	h := "x"
	for l, width := range [][2]int{{12, 64}, {64, 64}, {64, 3}} {
		d := newDense(uint64(200+10*l), width[0], width[1])
		h = ir.node("Gemm", fmt.Sprintf("dense%d", l), []string{h,
			ir.init(fmt.Sprintf("W%d", l), []int64{int64(d.out), int64(d.in)}, d.w),
			ir.init(fmt.Sprintf("b%d", l), []int64{int64(d.out)}, d.b)}, attrInt("transB", 1))
		if l < 2 {
			h = ir.node("Relu", fmt.Sprintf("relu%d", l), []string{h})
		}
	}
	ir.node("Softmax", "y", []string{h}, attrInt("axis", 1))
	rows := uniformRows(2, 101, 12, -1, 1)
	return ir.head(nn.Float32), rows[0], rows[1:]
}

// benchAttribute times gradattr.Attribute with o, after a warm-up call
// that compiles the programs, and reports the model rows per call.
func benchAttribute(b *testing.B, h gradattr.Model, x []float64, o gradattr.Options) {
	ctx := context.Background()
	r, err := gradattr.Attribute(ctx, h, x, gradattr.TargetTop, o)
	if err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	for b.Loop() {
		if _, err := gradattr.Attribute(ctx, h, x, gradattr.TargetTop, o); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(r.Cost.ForwardPasses), "rows/op")
	b.ReportMetric(float64(r.Cost.ForwardPasses)*float64(b.N)/b.Elapsed().Seconds(), "rows/s")
}

// BenchmarkONNXShapley times the Shapley benchmarks: exact enumeration on
// the pumps demo (8 features, K = 100 of its 200 reference rows: 25,501
// rows) and on a 12-feature MLP (K = 100: 409,501 rows), and the
// regression estimator with 2048 coalitions over about 64 SLIC superpixels
// of the welds demo's patch (K = its 32 reference patches: 65,569 rows),
// each at several batch sizes.
func BenchmarkONNXShapley(b *testing.B) {
	pumps, px := benchDemo(b, "pumps")
	welds, wx := benchDemo(b, "welds")
	m12, x12, ref12 := mlp12(b)
	cases := []struct {
		name string
		h    gradattr.Model
		x    []float64
		o    gradattr.Options
	}{
		{"pumps-exact", pumps, px, gradattr.Options{Reference: demoReference(b, "pumps"), Estimator: gradattr.EstimatorExact}},
		{"mlp12-exact", m12, x12, gradattr.Options{Reference: ref12, Estimator: gradattr.EstimatorExact}},
		{"welds-regression-64sp", welds, wx, gradattr.Options{Reference: demoReference(b, "welds"),
			Estimator: gradattr.EstimatorRegression, Superpixels: 64}},
	}
	for _, c := range cases {
		for _, batch := range []int{64, 256, 0, 2048} {
			c.o.Method, c.o.BatchSize = gradattr.MethodShapley, batch
			b.Run(fmt.Sprintf("%s/batch=%d", c.name, cmp.Or(batch, gradattr.DefaultForwardBatch)), func(b *testing.B) {
				benchAttribute(b, c.h, c.x, c.o)
			})
		}
	}
}
