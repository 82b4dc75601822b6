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
	// before it falls back to quadrature: about where the exact integral
	// stops being cheaper than automatic quadrature's 4097 points at the
	// default tolerance (bench/RESULTS.md has the measurements).
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
		integral, pieces, err := p.integrate(e, xb, opt.Exact == ExactAuto)
		if err != nil {
			return nil, "", fmt.Errorf("baseline %d: %w", b, err)
		}
		if integral == nil && pieces < 0 {
			return nil, fmt.Sprintf("the first %s of the path from baseline %d has more than %d pieces, so the whole path likely has more than %d",
				probeShare, b, p.maxPieces/probeDivisor, p.maxPieces), nil
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

// The probe of ExactAuto: before integrating a whole path it integrates
// its first 1/probeParts, with a piece limit of maxPieces/probeDivisor,
// and falls back to quadrature when that stretch alone has more pieces:
// at the stretch's density the whole path would have more than twice
// maxPieces. The stretch's integral is kept and the rest of the path
// integrated after it. On the benchmark's CNNs (thousands of pieces) this
// gives up after 64 pieces instead of 1024; networks with a few hundred
// pieces are not affected unless their pieces crowd into the start.
const (
	probeParts   = 32
	probeDivisor = 16
	probeShare   = "1/32"
)

// integrate integrates the path from xb to e.x exactly: in one piece, or
// (probe) its first 1/probeParts and then the rest. It returns a nil
// integral with a pieces count above maxPieces when the path has too many
// pieces, and with pieces −1 when the probe gave up.
func (p exactPlan) integrate(e *engine, xb []float64, probe bool) ([]float64, int, error) {
	call := func(from, to []float64, limit int) (integral []float64, pieces int, err error) {
		err = e.call("IntegratePath", func() (err error) {
			integral, pieces, err = p.pi.IntegratePath(e.ctx, from, to, e.target, limit)
			return err
		})
		if err == nil && integral != nil {
			err = checkReturned("IntegratePath", integral, e.size, 1)
		}
		return integral, pieces, err
	}
	if !probe || p.maxPieces < probeDivisor {
		return call(xb, e.x, p.maxPieces)
	}
	const share = 1.0 / probeParts
	mid := make([]float64, e.size)
	for i, v := range xb {
		mid[i] = v + share*(e.x[i]-v)
	}
	head, n1, err := call(xb, mid, p.maxPieces/probeDivisor)
	if err != nil || head == nil {
		return nil, -1, err
	}
	tail, n2, err := call(mid, e.x, p.maxPieces-n1)
	if err != nil || tail == nil {
		return nil, n1 + n2, err
	}
	// ∫₀¹ g(x′ + αΔ) dα = s·∫₀¹ g(x′ + βsΔ) dβ + (1 − s)·∫₀¹ g(m + β(x − m)) dβ,
	// m = x′ + sΔ.
	for i := range head {
		head[i] = share*head[i] + (1-share)*tail[i]
	}
	// The split point lies inside a piece (but for a path that breaks
	// exactly there), which both calls counted.
	return head, n1 + n2 - 1, nil
}
