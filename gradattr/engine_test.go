package gradattr

import (
	"context"
	"errors"
	"math"
	"runtime"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// runs computes each method on the tanh network with the given batch size
// and seed.
func runs(t *testing.T, batch int, seed uint64) map[string][]float64 {
	t.Helper()
	ctx := context.Background()
	net := newTanhNet(6, 7, 3, 8)
	m := net.model()
	x := []float64{0.4, -1, 0.7, 0.1, -0.3, 1.4}
	ref := [][]float64{{0, 0, 0, 0, 0, 0}, {1, 1, 1, 1, 1, 1}, {-0.5, 0.3, 0.2, -1, 0.8, 0}}
	out := map[string][]float64{}
	keep := func(name string, r *Result, err error) {
		require.NoError(t, err, name)
		out[name] = r.Attributions
	}
	for _, rule := range allRules {
		r, err := IntegratedGradients(ctx, m, x, TargetTop, IGOptions{Rule: rule, BatchSize: batch, Tolerance: 1e-6,
			Baselines: []Baseline{{}, {Kind: BaselineUniform, Lo: -1, Hi: 1, Seed: seed}}})
		keep("ig auto "+rule.String(), r, err)
		r, err = IntegratedGradients(ctx, m, x, 2, IGOptions{Rule: rule, BatchSize: batch, Points: 50})
		keep("ig 50 "+rule.String(), r, err)
	}
	for _, v := range []Variant{VariantMean, VariantSquared, VariantVariance} {
		r, err := SmoothGrad(ctx, m, x, 1, SmoothGradOptions{Samples: 100, Variant: v, BatchSize: batch, Seed: seed})
		keep("smoothgrad "+v.String(), r, err)
	}
	r, err := ExpectedGradients(ctx, m, x, 0, ExpectedGradientsOptions{Reference: ref, Samples: 150, BatchSize: batch, Seed: seed})
	keep("expected", r, err)
	uniform := []Baseline{{}, {Kind: BaselineUniform, Lo: -1, Hi: 1, Seed: seed}}
	r, err = Surrogate(ctx, m, x, 1, SurrogateOptions{Baselines: uniform, Coalitions: 200, Seed: seed, BatchSize: batch})
	keep("surrogate", r, err)
	r, err = Occlusion(ctx, m, x, 2, OcclusionOptions{Baselines: uniform, BatchSize: batch})
	keep("occlusion", r, err)
	return out
}

func TestBatchSizeInvariance(t *testing.T) {
	// Points and coalition rows are produced and summed in index order
	// whatever the chunking, so the bits agree exactly (IEEE 754 addition
	// is deterministic for a fixed operand order).
	want := runs(t, 1, 42)
	for _, bs := range []int{7, 64} {
		got := runs(t, bs, 42)
		for name, a := range want {
			assert.Equal(t, bits(a), bits(got[name]), "%s: batch 1 vs %d", name, bs)
		}
	}
}

func TestSeedReproducible(t *testing.T) {
	// Same seed, same bits (math/rand/v2 PCG is deterministic); another
	// seed changes every random method.
	a, b, c := runs(t, 64, 7), runs(t, 64, 7), runs(t, 64, 8)
	for name := range a {
		assert.Equal(t, bits(a[name]), bits(b[name]), name)
	}
	for _, name := range []string{"smoothgrad mean", "smoothgrad squared", "smoothgrad variance", "expected", "ig auto midpoint", "surrogate", "occlusion"} {
		assert.NotEqual(t, bits(a[name]), bits(c[name]), name)
	}
}

func bits(v []float64) []uint64 {
	b := make([]uint64, len(v))
	for i, f := range v {
		b[i] = math.Float64bits(f)
	}
	return b
}

// blocking is a Model whose Gradient waits for its context to end, and
// counts its calls.
type blocking struct {
	Func
	calls atomic.Int32
	// cancel, when set, makes Gradient ignore its context, answer
	// normally, and call cancel on its third call.
	cancel context.CancelFunc
}

func (b *blocking) Gradient(ctx context.Context, x []float64, n int, target []int) ([]float64, []float64, error) {
	if b.calls.Add(1) == 3 && b.cancel != nil {
		b.cancel()
	}
	if b.cancel != nil {
		return b.Func.Gradient(context.Background(), x, n, target)
	}
	<-ctx.Done()
	return nil, nil, ctx.Err()
}

func TestCancel(t *testing.T) {
	// A cancelled context ends every method promptly with ctx.Err(), with
	// no goroutine left behind (common practice for context-aware APIs).
	before := runtime.NumGoroutine()
	methods := map[string]func(ctx context.Context, m Model) error{
		"gradient": func(ctx context.Context, m Model) error {
			_, err := Gradient(ctx, m, []float64{1, 2, 3}, 0, GradientOptions{})
			return err
		},
		"ig": func(ctx context.Context, m Model) error {
			_, err := IntegratedGradients(ctx, m, []float64{1, 2, 3}, 0, IGOptions{Points: 1000, BatchSize: 10})
			return err
		},
		"smoothgrad": func(ctx context.Context, m Model) error {
			_, err := SmoothGrad(ctx, m, []float64{1, 2, 3}, 0, SmoothGradOptions{Samples: 1000, BatchSize: 10})
			return err
		},
		"expected": func(ctx context.Context, m Model) error {
			_, err := ExpectedGradients(ctx, m, []float64{1, 2, 3}, 0, ExpectedGradientsOptions{Reference: [][]float64{{0, 0, 0}}, Samples: 1000, BatchSize: 10})
			return err
		},
	}
	for name, run := range methods {
		// A model that honours ctx.
		m := &blocking{Func: *cubic(3)}
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan error, 1)
		go func() { done <- run(ctx, m) }()
		time.Sleep(20 * time.Millisecond)
		start := time.Now()
		cancel()
		select {
		case err := <-done:
			assert.ErrorIs(t, err, context.Canceled, name)
			assert.Less(t, time.Since(start), 2*time.Second, name)
		case <-time.After(5 * time.Second):
			t.Fatalf("%s did not return after cancel", name)
		}

		// A model that ignores ctx, cancelled during its third chunk: the
		// method makes no further call.
		if name != "gradient" {
			ctx, cancel = context.WithCancel(context.Background())
			m = &blocking{Func: *cubic(3), cancel: cancel}
			err := run(ctx, m)
			assert.ErrorIs(t, err, context.Canceled, name)
			assert.Equal(t, int32(3), m.calls.Load(), name) // of 100 chunks
		}
	}
	// Already cancelled: no model call at all.
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	m := &blocking{Func: *cubic(3)}
	_, err := IntegratedGradients(ctx, m, []float64{1, 2, 3}, 0, IGOptions{})
	assert.True(t, errors.Is(err, context.Canceled))
	assert.Zero(t, m.calls.Load())

	deadline := time.Now().Add(2 * time.Second)
	for runtime.NumGoroutine() > before && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	assert.LessOrEqual(t, runtime.NumGoroutine(), before)
}

func TestSettingsReproduce(t *testing.T) {
	// Settings record the defaults in effect: calling again with them
	// spelled out gives the same bits (determinism of PCG and of the
	// summation order, see TestSeedReproducible).
	ctx := context.Background()
	m := newTanhNet(4, 5, 2, 12).model()
	x := []float64{0.3, -0.2, 1.1, 0.6}
	r, err := SmoothGrad(ctx, m, x, 1, SmoothGradOptions{Seed: 99})
	require.NoError(t, err)
	s := r.Settings
	v, err := ParseVariant(s.Variant)
	require.NoError(t, err)
	again, err := SmoothGrad(ctx, m, x, r.Target, SmoothGradOptions{Samples: s.Samples, Noise: s.Noise, Variant: v, Seed: s.Seed, BatchSize: s.BatchSize})
	require.NoError(t, err)
	assert.Equal(t, bits(r.Attributions), bits(again.Attributions))

	ig, err := IntegratedGradients(ctx, m, x, TargetTop, IGOptions{Rule: RuleMidpoint, Points: 40})
	require.NoError(t, err)
	rule, err := ParseRule(ig.Settings.Rule)
	require.NoError(t, err)
	igAgain, err := IntegratedGradients(ctx, m, x, ig.Target, IGOptions{Rule: rule, Points: ig.Settings.Points,
		Tolerance: ig.Settings.Tolerance, Baselines: ig.Settings.Baselines})
	require.NoError(t, err)
	assert.Equal(t, bits(ig.Attributions), bits(igAgain.Attributions))
	assert.Equal(t, DefaultTolerance, ig.Settings.Tolerance)
	assert.Equal(t, DefaultBatchSize, ig.Settings.BatchSize)
}
