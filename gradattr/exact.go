package gradattr

import (
	"context"
	"fmt"
)

// ExactMode says whether integrated gradients integrate exactly
// (IGOptions.Exact): along the pieces of the path on which a piecewise-
// linear model is affine, rather than by quadrature.
type ExactMode int

// The modes. The zero value is ExactAuto.
const (
	// ExactAuto integrates exactly when the point count is automatic
	// (Points = 0), the model is a PathIntegrator, it reports itself
	// piecewise-linear and every path has at most MaxPieces pieces; by
	// quadrature otherwise, with the reason in Settings.ExactSkipped.
	ExactAuto ExactMode = iota
	// ExactNever integrates by quadrature only.
	ExactNever
	// ExactAlways integrates exactly or fails with an error wrapping
	// ErrOptions that says why (a fixed point count, a model that is not
	// piecewise-linear, naming the operator, a path with more pieces than
	// MaxPieces).
	ExactAlways
)

var exactModeNames = [...]string{"auto", "never", "always"}

// String returns "auto", "never" or "always".
func (m ExactMode) String() string {
	if m >= 0 && int(m) < len(exactModeNames) {
		return exactModeNames[m]
	}
	return fmt.Sprintf("ExactMode(%d)", int(m))
}

// Piece limits of exact integrated gradients.
const (
	// DefaultMaxPieces is the most pieces ExactAuto integrates exactly
	// before it falls back to quadrature. On the benchmark's 100-256-256-10
	// MLP a piece costs about 9 µs and an adaptive quadrature point 22 µs
	// (one thread, Intel Xeon with AVX-512): its 223 pieces take 2 ms, the
	// 182 points that reach 0.1% take 4 ms, so exact integration, a
	// thousand times more accurate, stays as cheap up to about 500 pieces
	// and within a factor of two up to 1024. nn's Head gives up as soon as
	// one layer's crossings alone show more (on a CNN, at its first ReLU,
	// within a millisecond).
	DefaultMaxPieces = 1024
	// MaxPiecesLimit bounds MaxPieces, and the pieces of ExactAlways.
	MaxPiecesLimit = 1 << 20
)

// PathIntegrator is a Model that integrates its own gradient exactly along
// a straight path: nn's Head does for networks that are piecewise-linear
// (Relu, max pooling and affine layers) up to a final Softmax, LogSoftmax
// or Sigmoid. Integrated gradients use it (IGOptions.Exact).
type PathIntegrator interface {
	// PiecewiseLinear returns nil when IntegratePath may be called, or an
	// error that says why not, in words for the user (the operator that
	// is not piecewise-linear).
	PiecewiseLinear() error
	// IntegratePath returns ∫₀¹ ∂F_target(from + α(to − from))/∂x dα,
	// one value per input feature, exact up to rounding, and the number of
	// pieces of the path. When the path has more than maxPieces pieces it
	// may stop early: it then returns a nil integral and a count above
	// maxPieces.
	IntegratePath(ctx context.Context, from, to []float64, target, maxPieces int) (integral []float64, pieces int, err error)
}

// exactPlan is what IntegratedGradients decided about exact integration:
// the model to integrate with (nil for quadrature), the piece limit, and
// why not when ExactAuto fell back.
type exactPlan struct {
	pi        PathIntegrator
	maxPieces int
	skipped   string
}

// planExact checks the exact-integration options against the model.
func planExact(m Model, opt IGOptions) (exactPlan, error) {
	var p exactPlan
	switch {
	case opt.Exact < ExactAuto || opt.Exact > ExactAlways:
		return p, fmt.Errorf("%w: exact mode %d, want ExactAuto, ExactNever or ExactAlways", ErrOptions, int(opt.Exact))
	case opt.MaxPieces < 0 || opt.MaxPieces > MaxPiecesLimit:
		return p, fmt.Errorf("%w: max pieces %d, want 0 (default) or 1..%d", ErrOptions, opt.MaxPieces, MaxPiecesLimit)
	case opt.Exact == ExactNever || (opt.Exact == ExactAuto && opt.Points > 0):
		return p, nil
	case opt.Points > 0:
		return p, fmt.Errorf("%w: exact integrated gradients take no point count, got %d points", ErrOptions, opt.Points)
	}
	p.maxPieces = opt.MaxPieces
	if p.maxPieces == 0 {
		p.maxPieces = DefaultMaxPieces
		if opt.Exact == ExactAlways {
			p.maxPieces = MaxPiecesLimit
		}
	}
	pi, ok := m.(PathIntegrator)
	if !ok {
		if opt.Exact == ExactAlways {
			return p, fmt.Errorf("%w: exact integrated gradients need a model that integrates its gradient along a path (a piecewise-linear network)", ErrOptions)
		}
		return p, nil
	}
	var reason error
	if err := callSafe("PiecewiseLinear", func() { reason = pi.PiecewiseLinear() }); err != nil {
		return p, err
	}
	if reason != nil {
		if opt.Exact == ExactAlways {
			return p, fmt.Errorf("%w: exact integrated gradients need a piecewise-linear network: %w", ErrOptions, reason)
		}
		p.skipped = reason.Error()
		return p, nil
	}
	p.pi = pi
	return p, nil
}

// exactIG integrates exactly from each baseline to x:
//
//	IG_i = (x_i − x′_i) · ∫₀¹ ∂F(x′ + α(x − x′))/∂x_i dα
//
// with the integral from the model (PathIntegrator.IntegratePath), then
// averages over the baselines as IntegratedGradients does. It returns a
// nil Result and the reason when a path has more than the piece limit
// and the mode allows falling back.
func exactIG(e *engine, p exactPlan, bases [][]float64, opt IGOptions, s Settings) (*Result, string, error) {
	total := make([]float64, e.size)
	meanBase := 0.0
	for b, xb := range bases {
		out, err := e.forwardOne(xb)
		if err != nil {
			return nil, "", err
		}
		meanBase += out[e.target]
		var integral []float64
		var pieces int
		err = e.call("IntegratePath", func() (err error) {
			integral, pieces, err = p.pi.IntegratePath(e.ctx, xb, e.x, e.target, p.maxPieces)
			return err
		})
		if err == nil && integral != nil {
			err = checkReturned("IntegratePath", integral, e.size, 1)
		}
		if err != nil {
			return nil, "", fmt.Errorf("baseline %d: %w", b, err)
		}
		if integral == nil {
			why := fmt.Sprintf("the path from baseline %d has more than %d pieces", b, p.maxPieces)
			if opt.Exact == ExactAlways {
				return nil, "", fmt.Errorf("%w: exact integrated gradients: %s (raise the piece limit or integrate by quadrature)", ErrOptions, why)
			}
			return nil, why, nil
		}
		s.Pieces = max(s.Pieces, pieces)
		for i, g := range integral {
			total[i] += (e.x[i] - xb[i]) * g
		}
	}
	nb := float64(len(bases))
	for i := range total {
		total[i] /= nb
	}
	meanBase /= nb
	s.Exact, s.Rule, s.MaxPieces = true, "", p.maxPieces
	r := e.result(total, s)
	r.BaselineOutput = meanBase
	r.Completeness = completeness(total, r.Output, meanBase, s.Tolerance, true)
	return r, "", nil
}
