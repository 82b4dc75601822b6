package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"
	"math"
	"math/rand"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// poolTieValues are the values the tie tests draw from: few distinct
// values, so that most windows hold several maxima, and both signed zeros,
// which compare equal but differ in their IEEE 754 bit patterns.
var poolTieValues = []float64{-2, -1, math.Copysign(0, -1), 0, 0, 1, 2, 2}

// poolTieInput draws n values from poolTieValues; with special it also
// sprinkles NaNs (one of them with a payload) and infinities.
func poolTieInput(rng *rand.Rand, n int, special bool) []float64 {
	x := make([]float64, n)
	for i := range x {
		x[i] = poolTieValues[rng.Intn(len(poolTieValues))]
	}
	if special {
		for k := 0; k < 1+n/40; k++ {
			switch k % 4 {
			case 0:
				x[rng.Intn(n)] = math.NaN()
			case 1:
				x[rng.Intn(n)] = math.Float64frombits(0xfff8_0000_0000_1234) // negative quiet NaN with a payload
			case 2:
				x[rng.Intn(n)] = math.Inf(1)
			default:
				x[rng.Intn(n)] = math.Inf(-1)
			}
		}
	}
	return x
}

// poolBits returns the IEEE 754 bit patterns of a float32 or float64 tensor.
func poolBits(t *testing.T, v G.Value) []uint64 {
	t.Helper()
	switch d := v.(*tensor.Dense).Data().(type) {
	case []float64:
		out := make([]uint64, len(d))
		for i, f := range d {
			out[i] = math.Float64bits(f)
		}
		return out
	case []float32:
		out := make([]uint64, len(d))
		for i, f := range d {
			out[i] = uint64(math.Float32bits(f))
		}
		return out
	}
	t.Fatalf("unexpected data %T", v)
	return nil
}

// poolGarbage is a tensor of dtype dt and shape shp filled with a NaN bit
// pattern that no kernel produces, to show which elements were not written.
func poolGarbage(dt tensor.Dtype, shp []int) *tensor.Dense {
	t := tensor.New(tensor.Of(dt), tensor.WithShape(shp...))
	switch d := t.Data().(type) {
	case []float64:
		for i := range d {
			d[i] = math.Float64frombits(0x7ff4_dead_beef_0001)
		}
	case []float32:
		for i := range d {
			d[i] = math.Float32frombits(0x7fa0_0bad)
		}
	}
	return t
}

// poolTyped converts v to element type T.
func poolTyped[T float](v []float64) []T {
	out := make([]T, len(v))
	for i, f := range v {
		out[i] = T(f)
	}
	return out
}

// poolCompareTiled checks the tiled kernels reached through the ops'
// UsePreallocDo (into garbage-filled buffers) bit for bit against the
// reference kernels.
func poolCompareTiled[T float](t *testing.T, dt tensor.Dtype, shp, kernel []int, takeMax bool, xv, dyv []float64) {
	t.Helper()
	op := &poolOp{rank: 2, max: takeMax, kernel: kernel, pads: []int{0, 0, 0, 0}, strides: kernel, dils: []int{1, 1}}
	oshp, g, err := op.geometry(shp)
	require.NoError(t, err)
	require.True(t, poolTiled(&g), "geometry %+v", g)
	poolCompareReference(t, dt, op, &g, shp, oshp, poolTyped[T](xv), poolTyped[T](dyv[:oshp.TotalSize()]))
}

func TestPoolTiledMatchesGeneric(t *testing.T) {
	// Bit patterns (IEEE 754) of the tiled kernels, portable and AVX2,
	// against the reference (generic windowed) kernels on inputs full of ties, signed zeros,
	// NaNs and infinities; odd sizes leave an uncovered border. The output
	// gradients include −0 and NaN, which 0 + dy maps as IEEE 754 says.
	t.Logf("assembly kernels: %t", f32.Asm())
	rng := rand.New(rand.NewSource(21))
	kernels := [][]int{{2, 2}, {3, 3}, {2, 3}, {1, 2}}
	sizes := []int{5, 7, 8, 9, 13, 16, 28, 31}
	for _, k := range kernels {
		for _, h := range sizes {
			for _, w := range sizes {
				for _, n := range []int{1, 3} {
					shp := []int{n, 2, h, w}
					size := n * 2 * h * w
					for _, special := range []bool{false, true} {
						xv := poolTieInput(rng, size, special)
						dyv := convRandArr(rng, size).data
						dyv[0], dyv[len(dyv)/2] = math.Copysign(0, -1), math.NaN()
						for _, takeMax := range []bool{true, false} {
							name := fmt.Sprintf("k%v/%v/special=%t/max=%t", k, shp, special, takeMax)
							t.Run(name+"/float64", func(t *testing.T) {
								poolCompareTiled[float64](t, tensor.Float64, shp, k, takeMax, xv, dyv)
							})
							t.Run(name+"/float32", func(t *testing.T) {
								poolCompareTiled[float32](t, tensor.Float32, shp, k, takeMax, xv, dyv)
							})
						}
					}
				}
			}
		}
	}
}

func TestPoolPreallocContract(t *testing.T) {
	// The buffer contract of the ops (common practice for gorgonia's
	// UsePreallocDoer): a fitting prealloc is written and returned, one of
	// the wrong shape or type or one that is an input is not used, and the
	// results are the same in every case.
	rng := rand.New(rand.NewSource(22))
	shp, oshp := []int{2, 3, 9, 10}, []int{2, 3, 4, 5}
	x := tensor.New(tensor.WithShape(shp...), tensor.WithBacking(poolTyped[float32](convDistinctArr(rng, shp...).data)))
	dy := tensor.New(tensor.WithShape(oshp...), tensor.WithBacking(poolTyped[float32](convRandArr(rng, oshp...).data)))
	for _, spec := range []struct {
		name   string
		kernel []int
		pads   []int
	}{{"tiled", []int{2, 2}, []int{0, 0, 0, 0}}, {"generic", []int{3, 2}, []int{1, 0, 0, 0}}} {
		t.Run(spec.name, func(t *testing.T) {
			op := &poolOp{rank: 2, max: true, kernel: spec.kernel, pads: spec.pads, strides: []int{2, 2}, dils: []int{1, 1}}
			yshp, _, err := op.geometry(shp)
			require.NoError(t, err)
			bop := &poolBackOp{*op}
			y0, err := op.Do(x)
			require.NoError(t, err)
			dx0, err := bop.Do(x, dy)
			require.NoError(t, err)

			fit := poolGarbage(tensor.Float32, yshp)
			y, err := op.UsePreallocDo(fit, x)
			require.NoError(t, err)
			require.Same(t, fit, y)
			require.Equal(t, poolBits(t, y0), poolBits(t, y))
			fit = poolGarbage(tensor.Float32, shp)
			dx, err := bop.UsePreallocDo(fit, x, dy)
			require.NoError(t, err)
			require.Same(t, fit, dx)
			require.Equal(t, poolBits(t, dx0), poolBits(t, dx))

			for _, bad := range []G.Value{poolGarbage(tensor.Float64, yshp), poolGarbage(tensor.Float32, []int{1, 3, 4, 5}), x, G.NewF32(1)} {
				y, err := op.UsePreallocDo(bad, x)
				require.NoError(t, err)
				require.NotSame(t, bad, y)
				require.Equal(t, poolBits(t, y0), poolBits(t, y))
			}
			for _, bad := range []G.Value{poolGarbage(tensor.Float64, shp), x, G.NewF32(1)} {
				dx, err := bop.UsePreallocDo(bad, x, dy)
				require.NoError(t, err)
				require.NotSame(t, bad, dx)
				require.Equal(t, poolBits(t, dx0), poolBits(t, dx))
			}
		})
	}
}

func TestPoolWarmZeroAllocs(t *testing.T) {
	// A warm call with a fitting prealloc allocates nothing (common
	// practice: testing.AllocsPerRun).
	rng := rand.New(rand.NewSource(23))
	shp := []int{3, 4, 12, 12}
	x := tensor.New(tensor.WithShape(shp...), tensor.WithBacking(poolTyped[float32](convRandArr(rng, shp...).data)))
	cases := []*poolOp{
		{rank: 2, max: true, kernel: []int{2, 2}, pads: []int{0, 0, 0, 0}, strides: []int{2, 2}, dils: []int{1, 1}},
		{rank: 2, kernel: []int{2, 2}, pads: []int{0, 0, 0, 0}, strides: []int{2, 2}, dils: []int{1, 1}},
		{rank: 2, max: true, kernel: []int{3, 3}, pads: []int{1, 1, 1, 1}, strides: []int{2, 2}, dils: []int{1, 1}},
		{rank: 2, global: true},
	}
	for _, op := range cases {
		t.Run(op.String(), func(t *testing.T) {
			yshp, _, err := op.geometry(shp)
			require.NoError(t, err)
			dy := tensor.New(tensor.WithShape(yshp...), tensor.WithBacking(poolTyped[float32](convRandArr(rng, yshp...).data)))
			y := tensor.New(tensor.Of(tensor.Float32), tensor.WithShape(yshp...))
			dx := tensor.New(tensor.Of(tensor.Float32), tensor.WithShape(shp...))
			bop := &poolBackOp{*op}
			fwd := func() {
				if _, err := op.UsePreallocDo(y, x); err != nil {
					t.Fatal(err)
				}
			}
			bwd := func() {
				if _, err := bop.UsePreallocDo(dx, x, dy); err != nil {
					t.Fatal(err)
				}
			}
			require.Zero(t, testing.AllocsPerRun(20, fwd), "forward")
			require.Zero(t, testing.AllocsPerRun(20, bwd), "backward")
		})
	}
}

func TestPoolTiledCasesAreTiled(t *testing.T) {
	// The gradient cases named "tiled" run the tiled kernels (so that the
	// finite-difference and float32 checks of TestPoolGradients and
	// TestPoolFloat32 cover them), the others the generic ones.
	for _, c := range poolCases {
		if c.global {
			continue
		}
		op := &poolOp{rank: len(c.x) - 2, max: c.max, kernel: c.spec.Kernel}
		var err error
		op.pads, op.strides, op.dils, err = convNormalize(op.rank, c.spec.Pads, c.spec.Strides, c.spec.Dilations)
		require.NoError(t, err)
		op.ceil = c.spec.CeilMode
		_, g, err := op.geometry(c.x)
		require.NoError(t, err)
		require.Equal(t, strings.Contains(c.name, "tiled"), poolTiled(&g), c.name)
	}
}

func TestPoolGlobalMatchesGeneric(t *testing.T) {
	// IEEE 754 bit patterns of the global kernels against the reference
	// kernels on the global geometry (one window per plane), with ties,
	// signed zeros, NaNs and infinities, and plane counts on both sides of
	// the four-plane step.
	rng := rand.New(rand.NewSource(24))
	for _, shp := range [][]int{{1, 1, 1, 1}, {1, 3, 5}, {2, 3, 4, 4}, {3, 3, 2, 7}, {1, 2, 3, 2, 4}} {
		for _, special := range []bool{false, true} {
			for _, takeMax := range []bool{true, false} {
				t.Run(fmt.Sprintf("%v/special=%t/max=%t", shp, special, takeMax), func(t *testing.T) {
					op := &poolOp{rank: len(shp) - 2, max: takeMax, global: true}
					oshp, g, err := op.geometry(shp)
					require.NoError(t, err)
					size := tensor.Shape(shp).TotalSize()
					x := poolTieInput(rng, size, special)
					dy := convRandArr(rng, oshp.TotalSize()).data
					dy[0] = math.Copysign(0, -1)
					poolCompareReference(t, tensor.Float64, op, &g, shp, oshp, x, dy)
					poolCompareReference(t, tensor.Float32, op, &g, shp, oshp, poolTyped[float32](x), poolTyped[float32](dy))
				})
			}
		}
	}
}

func TestPoolMatchesReference(t *testing.T) {
	// IEEE 754 bit patterns of the op (table-driven windows, or the tiled
	// kernels where the geometry allows) against the reference kernels of
	// pool_ref_test.go on random geometries: kernels, strides,
	// dilations, asymmetric pads, ceil mode and count_include_pad, over
	// inputs with ties, signed zeros, NaNs and infinities.
	rng := rand.New(rand.NewSource(25))
	ran := 0
	for ran < 300 {
		kernel := []int{1 + rng.Intn(4), 1 + rng.Intn(4)}
		strides := []int{1 + rng.Intn(3), 1 + rng.Intn(3)}
		dils := []int{1 + rng.Intn(2), 1 + rng.Intn(2)}
		pads := []int{rng.Intn(3), rng.Intn(3), rng.Intn(3), rng.Intn(3)}
		shp := []int{1 + 2*rng.Intn(2), 2, 1 + rng.Intn(9), 1 + rng.Intn(12)}
		takeMax, ceil := rng.Intn(2) == 0, rng.Intn(2) == 0
		op := &poolOp{rank: 2, max: takeMax, kernel: kernel, pads: pads, strides: strides, dils: dils, ceil: ceil, includePad: !takeMax && rng.Intn(2) == 0}
		oshp, g, err := op.geometry(shp)
		if err != nil {
			continue // window larger than the padded input
		}
		ran++
		x := poolTieInput(rng, tensor.Shape(shp).TotalSize(), rng.Intn(2) == 0)
		dy := convRandArr(rng, oshp.TotalSize()).data
		t.Run(op.String()+fmt.Sprint(shp)+"/float64", func(t *testing.T) {
			poolCompareReference(t, tensor.Float64, op, &g, shp, oshp, x, dy)
		})
		t.Run(op.String()+fmt.Sprint(shp)+"/float32", func(t *testing.T) {
			poolCompareReference(t, tensor.Float32, op, &g, shp, oshp, poolTyped[float32](x), poolTyped[float32](dy))
		})
	}
}

// poolCompareReference checks op's UsePreallocDo, forward and backward
// into garbage-filled buffers, bit for bit against the reference kernels.
func poolCompareReference[T float](t *testing.T, dt tensor.Dtype, op *poolOp, g *convGeom, shp, oshp tensor.Shape, x, dy []T) {
	t.Helper()
	planes := shp[0] * shp[1]
	wantY := make([]T, oshp.TotalSize())
	wantDX := make([]T, len(x))
	poolForward(g, planes, op.max, op.includePad, x, wantY)
	poolBackward(g, planes, op.max, op.includePad, x, dy, wantDX)
	xt := tensor.New(tensor.WithShape(shp...), tensor.WithBacking(x))
	dyt := tensor.New(tensor.WithShape(oshp...), tensor.WithBacking(dy))
	y, err := op.UsePreallocDo(poolGarbage(dt, oshp), xt)
	require.NoError(t, err)
	require.Equal(t, poolBits(t, tensor.New(tensor.WithShape(oshp...), tensor.WithBacking(wantY))), poolBits(t, y), "forward")
	dx, err := (&poolBackOp{*op}).UsePreallocDo(poolGarbage(dt, shp), xt, dyt)
	require.NoError(t, err)
	require.Equal(t, poolBits(t, tensor.New(tensor.WithShape(shp...), tensor.WithBacking(wantDX))), poolBits(t, dx), "backward")
}
