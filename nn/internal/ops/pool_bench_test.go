package ops

import (
	"fmt"
	"math/rand"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// poolBenchShapes are the pool inputs of the bench zoo's convolutional
// models (bench/models: cnn-m and cnn-s) at the batch sizes the comparison
// runs (1 for predict and gradient, 50 for SmoothGrad, 64 for IG).
var poolBenchShapes = [][]int{
	{64, 16, 32, 32}, // cnn-m pool 1
	{64, 32, 16, 16}, // cnn-m pool 2
	{1, 8, 28, 28},   // cnn-s pool 1, batch 1
	{64, 8, 28, 28},  // cnn-s pool 1
	{64, 16, 14, 14}, // cnn-s pool 2
}

// poolBenchInput is a rectified uniform input, as after the ReLU that
// precedes every pool of the zoo (about half the values are zero, so
// windows of zeros tie).
func poolBenchInput(rng *rand.Rand, shape []int) *tensor.Dense {
	a := convRandArr(rng, shape...)
	for i, v := range a.data {
		a.data[i] = max(v, 0)
	}
	return a.tensor(tensor.Float32)
}

// BenchmarkPoolZoo times the 2×2 stride-2 max pool forward and input
// gradient on the zoo's shapes, float32. Bytes per op are the bytes read
// and written (forward: x and y; backward: x, dy and dx), so the reported
// MB/s is the achieved memory throughput. Variants: "generic" runs the
// windowed kernels poolForward and poolBackward (with the clear of dx they
// need) into a reused buffer, "do" the op's Do (tiled kernels, new output
// each call), "prealloc" UsePreallocDo into a reused buffer.
func BenchmarkPoolZoo(b *testing.B) {
	for _, shp := range poolBenchShapes {
		rng := rand.New(rand.NewSource(1))
		x := poolBenchInput(rng, shp)
		oshp := []int{shp[0], shp[1], shp[2] / 2, shp[3] / 2}
		dy := convRandArr(rng, oshp...).tensor(tensor.Float32)
		fwd := &poolOp{rank: 2, max: true, kernel: []int{2, 2}, pads: []int{0, 0, 0, 0}, strides: []int{2, 2}, dils: []int{1, 1}}
		bwd := &poolBackOp{*fwd}
		_, g, err := fwd.geometry(x.Shape())
		if err != nil {
			b.Fatal(err)
		}
		planes := shp[0] * shp[1]
		nx, ny := int64(x.Size()), int64(dy.Size())
		name := fmt.Sprintf("%dx%dx%dx%d", shp[0], shp[1], shp[2], shp[3])
		b.Run(name+"/fwd/generic", func(b *testing.B) {
			b.SetBytes(4 * (nx + ny))
			y := make([]float32, ny)
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				poolForward(&g, planes, true, false, x.Float32s(), y)
			}
		})
		b.Run(name+"/fwd/do", func(b *testing.B) {
			b.SetBytes(4 * (nx + ny))
			poolBenchRun(b, fwd, false, x)
		})
		b.Run(name+"/fwd/prealloc", func(b *testing.B) {
			b.SetBytes(4 * (nx + ny))
			poolBenchRun(b, fwd, true, x)
		})
		b.Run(name+"/bwd/generic", func(b *testing.B) {
			b.SetBytes(4 * (2*nx + ny))
			dx := make([]float32, nx)
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				clear(dx)
				poolBackward(&g, planes, true, false, x.Float32s(), dy.Float32s(), dx)
			}
		})
		b.Run(name+"/bwd/do", func(b *testing.B) {
			b.SetBytes(4 * (2*nx + ny))
			poolBenchRun(b, bwd, false, x, dy)
		})
		b.Run(name+"/bwd/prealloc", func(b *testing.B) {
			b.SetBytes(4 * (2*nx + ny))
			poolBenchRun(b, bwd, true, x, dy)
		})
	}
}

// poolBenchRun calls op on in b.N times: through Do, or with reuse through
// UsePreallocDo into the result of a first call.
func poolBenchRun(b *testing.B, op G.Op, reuse bool, in ...G.Value) {
	out, err := op.Do(in...)
	if err != nil {
		b.Fatal(err)
	}
	pd := op.(G.UsePreallocDoer)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if reuse {
			_, err = pd.UsePreallocDo(out, in...)
		} else {
			_, err = op.Do(in...)
		}
		if err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkPoolAverage times the average and global pools, float32, on the
// first cnn-m pool shape: the 2×2 tiled average, the 3×3 stride-2 average
// with count_include_pad (windowed kernels), and the global max and
// average. Bytes as in BenchmarkPoolZoo.
func BenchmarkPoolAverage(b *testing.B) {
	shp := []int{64, 16, 32, 32}
	x := poolBenchInput(rand.New(rand.NewSource(1)), shp)
	ops := []struct {
		name string
		op   *poolOp
	}{
		{"avg2x2", &poolOp{rank: 2, kernel: []int{2, 2}, pads: []int{0, 0, 0, 0}, strides: []int{2, 2}, dils: []int{1, 1}}},
		{"avg3x3s2pad1", &poolOp{rank: 2, kernel: []int{3, 3}, pads: []int{1, 1, 1, 1}, strides: []int{2, 2}, dils: []int{1, 1}, includePad: true}},
		{"globalmax", &poolOp{rank: 2, max: true, global: true}},
		{"globalavg", &poolOp{rank: 2, global: true}},
	}
	for _, o := range ops {
		oshp, _, err := o.op.geometry(x.Shape())
		if err != nil {
			b.Fatal(err)
		}
		dy := convRandArr(rand.New(rand.NewSource(2)), oshp...).tensor(tensor.Float32)
		nx, ny := int64(x.Size()), int64(dy.Size())
		b.Run(o.name+"/fwd", func(b *testing.B) {
			b.SetBytes(4 * (nx + ny))
			poolBenchRun(b, o.op, true, x)
		})
		b.Run(o.name+"/bwd", func(b *testing.B) {
			b.SetBytes(4 * (2*nx + ny))
			poolBenchRun(b, &poolBackOp{*o.op}, true, x, dy)
		})
	}
}

// BenchmarkPoolWindowed times the windowed (not tiled) 3×3 stride-2 pad-1
// pools, float32, against the reference kernels of pool_ref_test.go on
// the same data (variant "reference"; "op" is UsePreallocDo into a reused
// buffer). Bytes as in BenchmarkPoolZoo.
func BenchmarkPoolWindowed(b *testing.B) {
	shp := []int{8, 16, 32, 32}
	x := poolBenchInput(rand.New(rand.NewSource(1)), shp)
	for _, takeMax := range []bool{true, false} {
		op := &poolOp{rank: 2, max: takeMax, kernel: []int{3, 3}, pads: []int{1, 1, 1, 1}, strides: []int{2, 2}, dils: []int{1, 1}, includePad: !takeMax}
		oshp, g, err := op.geometry(x.Shape())
		if err != nil {
			b.Fatal(err)
		}
		dy := convRandArr(rand.New(rand.NewSource(2)), oshp...).tensor(tensor.Float32)
		nx, ny := int64(x.Size()), int64(dy.Size())
		planes := shp[0] * shp[1]
		name := "avg"
		if takeMax {
			name = "max"
		}
		b.Run(name+"/fwd/reference", func(b *testing.B) {
			b.SetBytes(4 * (nx + ny))
			y := make([]float32, ny)
			for i := 0; i < b.N; i++ {
				poolForward(&g, planes, takeMax, !takeMax, x.Float32s(), y)
			}
		})
		b.Run(name+"/fwd/op", func(b *testing.B) {
			b.SetBytes(4 * (nx + ny))
			poolBenchRun(b, op, true, x)
		})
		b.Run(name+"/bwd/reference", func(b *testing.B) {
			b.SetBytes(4 * (2*nx + ny))
			dx := make([]float32, nx)
			for i := 0; i < b.N; i++ {
				clear(dx)
				poolBackward(&g, planes, takeMax, !takeMax, x.Float32s(), dy.Float32s(), dx)
			}
		})
		b.Run(name+"/bwd/op", func(b *testing.B) {
			b.SetBytes(4 * (2*nx + ny))
			poolBenchRun(b, &poolBackOp{*op}, true, x, dy)
		})
	}
}
