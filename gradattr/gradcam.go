package gradattr

import (
	"context"
	"fmt"
)

// GradCAM is Grad-CAM (Selvaraju et al. 2017, eq. 1–2) for a model whose
// input is the activation A of a convolutional layer, shaped (C, H, W) (or
// (C, L) for a one-dimensional layer, or more spatial axes): with y the
// target output,
//
//	α_c = (1/Z) Σ_{h,w} ∂y/∂A_{c,h,w}          (eq. 1; Z = H·W)
//	map = ReLU(Σ_c α_c A_c)                     (eq. 2)
//
// The result's Attributions are the map, row-major in the spatial shape
// (H, W), which is its Shape. The paper takes y before the final softmax:
// give the model the logits. The map is not a share of the output, so the
// result has no Completeness.
func GradCAM(ctx context.Context, m Model, a []float64, target int) (*Result, error) {
	e, err := newEngine(ctx, m, a, target, 1)
	if err != nil {
		return nil, err
	}
	if len(e.shape) < 2 {
		return nil, fmt.Errorf("%w: Grad-CAM needs an activation with a channel axis and at least one spatial axis, (C, H, W) or (C, L), got shape %v", ErrOptions, e.shape)
	}
	grad, err := e.gradientAt(a)
	if err != nil {
		return nil, err
	}
	channels := e.shape[0]
	z := e.size / channels
	cam := make([]float64, z)
	for c := range channels {
		var alpha float64
		for _, g := range grad[c*z : (c+1)*z] {
			alpha += g
		}
		alpha /= float64(z)
		for i, v := range a[c*z : (c+1)*z] {
			cam[i] += alpha * v
		}
	}
	for i, v := range cam {
		cam[i] = max(v, 0)
	}
	r := e.result(cam, Settings{Method: MethodGradCAM})
	r.Shape = append([]int(nil), e.shape[1:]...)
	return r, nil
}
