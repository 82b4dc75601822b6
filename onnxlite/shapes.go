package onnxlite

import (
	"fmt"
	"slices"
)

// shapeRule computes the output shapes of a node that is not folded.
type shapeRule struct {
	// inputs is how many leading inputs the operator's spec requires.
	// outShapes checks that they are present, so fn reads c.in[0] to
	// c.in[inputs-1] without a nil check. Rules whose later inputs are
	// required only at some opsets or after other checks (Reshape, Pad,
	// BatchNormalization, Concat) check those themselves.
	inputs int
	fn     func(c *nodeCtx) ([]ValueShape, error)
}

var shapeRules map[string]shapeRule

func init() {
	shapeRules = map[string]shapeRule{
		"Add": {2, ruleBinary}, "Sub": {2, ruleBinary}, "Mul": {2, ruleBinary}, "Div": {2, ruleBinary}, "Pow": {2, ruleBinary},
		"PRelu": {2, rulePRelu},
		"Gemm":  {2, ruleGemm}, "MatMul": {2, ruleMatMul},
		"Conv": {2, ruleConv}, "MaxPool": {1, rulePool}, "AveragePool": {1, rulePool},
		"GlobalAveragePool": {1, ruleGlobalPool}, "GlobalMaxPool": {1, ruleGlobalPool},
		"BatchNormalization": {1, ruleBatchNorm},
		"Flatten":            {1, ruleFlatten}, "Reshape": {1, ruleReshape}, "Transpose": {1, ruleTranspose},
		"Squeeze": {1, ruleSqueeze}, "Unsqueeze": {1, ruleUnsqueeze}, "Concat": {0, ruleConcat}, "Pad": {1, rulePad},
		"ReduceMean": {1, ruleReduce}, "ReduceSum": {1, ruleReduce}, "ReduceMax": {1, ruleReduce},
		"ReduceMin": {1, ruleReduce}, "ReduceL2": {1, ruleReduce}, "ReduceLogSumExp": {1, ruleReduce},
		"Softmax": {1, ruleSoftmax}, "LogSoftmax": {1, ruleSoftmax},
		"Dropout": {1, ruleDropout}, "Cast": {1, ruleCast}, "Clip": {1, ruleClip},
	}
	for _, op := range []string{"Neg", "Abs", "Sqrt", "Exp", "Log", "Relu", "LeakyRelu", "Elu",
		"Selu", "Celu", "Sigmoid", "HardSigmoid", "HardSwish", "Tanh", "Softplus", "Softsign",
		"Erf", "Identity", "Mish", "ThresholdedRelu", "Reciprocal", "Sign", "Floor", "Ceil", "Round"} {
		shapeRules[op] = shapeRule{1, ruleUnary}
	}
	shapeRules["Gelu"] = shapeRule{1, ruleGelu}
	addIndexRules()
	addNormRules()
	addResizeRules()
}

// outShapes checks the node's required inputs and applies its shape rule.
func (c *nodeCtx) outShapes() ([]ValueShape, error) {
	r, ok := shapeRules[c.n.OpType]
	if !ok {
		return nil, c.errorf("no shape rule")
	}
	for i := 0; i < r.inputs; i++ {
		if _, err := c.need(i); err != nil {
			return nil, err
		}
	}
	return r.fn(c)
}

// Broadcast returns the numpy broadcast of shapes a and b (ONNX
// Broadcasting.md, multidirectional): dims are aligned from the right and each
// pair must be equal or contain a 1.
func Broadcast(a, b []int) ([]int, error) {
	n := max(len(a), len(b))
	out := make([]int, n)
	for i := 0; i < n; i++ {
		da, db := 1, 1
		if k := len(a) - n + i; k >= 0 {
			da = a[k]
		}
		if k := len(b) - n + i; k >= 0 {
			db = b[k]
		}
		switch {
		case da == db:
			out[i] = da
		case da == 1:
			out[i] = db
		case db == 1:
			out[i] = da
		default:
			return nil, fmt.Errorf("shapes %v and %v do not broadcast: axis %d (from the right) has %d and %d, expected equal sizes or a 1",
				a, b, n-i, da, db)
		}
	}
	return out, nil
}

// unidirectional checks that b broadcasts to a without changing a.
func unidirectional(a, b []int) error {
	out, err := Broadcast(a, b)
	if err != nil {
		return err
	}
	if !slices.Equal(out, a) {
		return fmt.Errorf("shape %v does not broadcast to %v without growing it", b, a)
	}
	return nil
}

// normAxis maps axis in [-rank, rank) to [0, rank).
func normAxis(axis int64, rank int) (int, error) {
	if axis < -int64(rank) || axis >= int64(rank) {
		return 0, fmt.Errorf("axis %d out of range: expected %d to %d for rank %d", axis, -rank, rank-1, rank)
	}
	if axis < 0 {
		axis += int64(rank)
	}
	return int(axis), nil
}

func ruleUnary(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	return []ValueShape{{x.DType, slices.Clone(x.Shape)}}, nil
}

// ruleGelu: the output has the input's shape; approximate is none or tanh.
func ruleGelu(c *nodeCtx) ([]ValueShape, error) {
	if a := c.n.AttrString("approximate", "none"); a != "none" && a != "tanh" {
		return nil, c.errorf("approximate %q: expected none or tanh", a)
	}
	return ruleUnary(c)
}

// ruleBinary covers the elementwise Add, Sub, Mul, Div and Pow: numpy
// broadcasting from opset 7, the legacy broadcast/axis attributes before it.
func ruleBinary(c *nodeCtx) ([]ValueShape, error) {
	a, b := c.in[0], c.in[1]
	if c.n.OpType != "Pow" && a.DType != b.DType {
		return nil, c.errorf("expected both inputs of one element type, got %v and %v", a.DType, b.DType)
	}
	if c.opset < 7 {
		out, err := legacyBroadcast(c, a.Shape, b.Shape)
		if err != nil {
			return nil, err
		}
		return []ValueShape{{a.DType, out}}, nil
	}
	out, err := Broadcast(a.Shape, b.Shape)
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{a.DType, out}}, nil
}

// legacyBroadcast is the opset 1–6 rule: without broadcast=1 the shapes must
// be equal; with it B must match a contiguous run of A's dims (size 1 allowed)
// starting at axis, or ending at A's last axis when axis is absent.
func legacyBroadcast(c *nodeCtx, a, b []int) ([]int, error) {
	if c.n.AttrInt("broadcast", 0) == 0 {
		if !slices.Equal(a, b) {
			return nil, c.errorf("without broadcast=1 (opset %d) expected equal shapes, got %v and %v", c.opset, a, b)
		}
		return slices.Clone(a), nil
	}
	if len(b) > len(a) {
		return nil, c.errorf("legacy broadcast: B %v has more axes than A %v", b, a)
	}
	start := len(a) - len(b)
	if at := c.n.Attr("axis"); at != nil {
		ax, err := normAxis(at.I, len(a))
		if err != nil && len(b) > 0 {
			return nil, c.errorf("%v", err)
		}
		start = ax
	}
	if start+len(b) > len(a) {
		return nil, c.errorf("legacy broadcast: B %v at axis %d runs past A %v", b, start, a)
	}
	for i, d := range b {
		if d != 1 && d != a[start+i] {
			return nil, c.errorf("legacy broadcast: B %v does not match A %v at axis %d", b, a, start+i)
		}
	}
	return slices.Clone(a), nil
}

func rulePRelu(c *nodeCtx) ([]ValueShape, error) {
	x, slope := c.in[0], c.in[1]
	if c.opset >= 7 {
		if err := unidirectional(x.Shape, slope.Shape); err != nil {
			return nil, c.errorf("slope: %v", err)
		}
	} else if prod(slope.Shape) != 1 && (len(x.Shape) < 2 || prod(slope.Shape) != x.Shape[1]) {
		// Opset 6 PRelu: slope is a scalar or has one value per channel.
		if err := unidirectional(x.Shape, slope.Shape); err != nil {
			return nil, c.errorf("slope %v: expected one value or one per channel of %v", slope.Shape, x.Shape)
		}
	}
	return []ValueShape{{x.DType, slices.Clone(x.Shape)}}, nil
}

// ruleGemm: Y = alpha·A'·B' + beta·C with A' = transA ? Aᵀ : A (M×K) and
// B' = transB ? Bᵀ : B (K×N); C broadcasts to M×N (optional from opset 11).
func ruleGemm(c *nodeCtx) ([]ValueShape, error) {
	a, b := c.in[0], c.in[1]
	if len(a.Shape) != 2 || len(b.Shape) != 2 {
		return nil, c.errorf("expected 2-D A and B, got %v and %v", a.Shape, b.Shape)
	}
	m, k := a.Shape[0], a.Shape[1]
	if c.n.AttrInt("transA", 0) != 0 {
		m, k = k, m
	}
	kb, n := b.Shape[0], b.Shape[1]
	if c.n.AttrInt("transB", 0) != 0 {
		kb, n = n, kb
	}
	if k != kb {
		return nil, c.errorf("inner dimensions differ: A' is %d×%d, B' is %d×%d", m, k, kb, n)
	}
	out := []int{m, n}
	if cv := c.input(2); cv != nil {
		if c.opset < 7 && c.n.AttrInt("broadcast", 0) == 0 {
			if !slices.Equal(cv.Shape, out) {
				return nil, c.errorf("without broadcast=1 (opset %d) expected C of shape %v, got %v", c.opset, out, cv.Shape)
			}
		} else if err := unidirectional(out, cv.Shape); err != nil {
			return nil, c.errorf("C: %v", err)
		}
	} else if c.opset < 11 {
		return nil, c.errorf("expected input C (optional only from opset 11), got none at opset %d", c.opset)
	}
	return []ValueShape{{a.DType, out}}, nil
}

// ruleMatMul follows numpy.matmul: 1-D operands are promoted (a 1 prepended
// to A, appended to B) and removed again; leading dims broadcast.
func ruleMatMul(c *nodeCtx) ([]ValueShape, error) {
	a, b := c.in[0], c.in[1]
	as, bs := slices.Clone(a.Shape), slices.Clone(b.Shape)
	if len(as) == 0 || len(bs) == 0 {
		return nil, c.errorf("expected operands of rank ≥ 1, got %v and %v", a.Shape, b.Shape)
	}
	va, vb := len(as) == 1, len(bs) == 1
	if va {
		as = []int{1, as[0]}
	}
	if vb {
		bs = []int{bs[0], 1}
	}
	if as[len(as)-1] != bs[len(bs)-2] {
		return nil, c.errorf("inner dimensions differ: %v and %v (%d vs %d)", a.Shape, b.Shape, as[len(as)-1], bs[len(bs)-2])
	}
	batch, err := Broadcast(as[:len(as)-2], bs[:len(bs)-2])
	if err != nil {
		return nil, c.errorf("batch dims: %v", err)
	}
	out := append(batch, as[len(as)-2], bs[len(bs)-1])
	if va {
		out = slices.Delete(out, len(out)-2, len(out)-1)
	}
	if vb {
		out = out[:len(out)-1]
	}
	return []ValueShape{{a.DType, out}}, nil
}

// spatialParams reads kernel_shape (or kernel), strides, dilations, pads and
// auto_pad for n spatial axes and returns the output sizes. The sizes follow
// the ONNX Conv/MaxPool/AveragePool specs:
//
//	NOTSET: out = ⌊(in + pad_begin + pad_end − ((k−1)·d + 1)) / s⌋ + 1  (⌈·⌉ with ceil_mode)
//	SAME_UPPER, SAME_LOWER: out = ⌈in / s⌉
//	VALID: out = ⌈(in − ((k−1)·d + 1) + 1) / s⌉
func spatialOut(c *nodeCtx, in []int, kernel []int64, ceil bool) ([]int, error) {
	n := len(in)
	if len(kernel) != n {
		return nil, c.errorf("kernel_shape %v: expected %d spatial dims for input spatial shape %v", kernel, n, in)
	}
	strides := c.n.AttrInts("strides", nil)
	dil := c.n.AttrInts("dilations", nil)
	pads := c.n.AttrInts("pads", nil)
	if strides != nil && len(strides) != n {
		return nil, c.errorf("strides %v: expected %d values", strides, n)
	}
	if dil != nil && len(dil) != n {
		return nil, c.errorf("dilations %v: expected %d values", dil, n)
	}
	if pads != nil && len(pads) != 2*n {
		return nil, c.errorf("pads %v: expected %d values (begins then ends)", pads, 2*n)
	}
	autoPad := c.n.AttrString("auto_pad", "NOTSET")
	out := make([]int, n)
	for i := 0; i < n; i++ {
		k, s, d := kernel[i], int64(1), int64(1)
		if strides != nil {
			s = strides[i]
		}
		if dil != nil {
			d = dil[i]
		}
		if k < 1 || s < 1 || d < 1 {
			return nil, c.errorf("axis %d: expected kernel, stride and dilation ≥ 1, got %d, %d, %d", i, k, s, d)
		}
		ek := (k-1)*d + 1
		x := int64(in[i])
		var o int64
		switch autoPad {
		case "NOTSET", "":
			var pb, pe int64
			if pads != nil {
				pb, pe = pads[i], pads[n+i]
			}
			if pb < 0 || pe < 0 {
				return nil, c.errorf("pads %v: expected non-negative values", pads)
			}
			span := x + pb + pe - ek
			if span < 0 {
				return nil, c.errorf("axis %d: padded input %d is smaller than the effective kernel %d", i, x+pb+pe, ek)
			}
			if ceil {
				o = (span+s-1)/s + 1
				// A last window that would start in the end padding is
				// dropped (MaxPool-22 and AveragePool-22 say so; ONNX
				// Runtime drops it at every opset).
				if (o-1)*s >= x+pb {
					o--
				}
			} else {
				o = span/s + 1
			}
		case "SAME_UPPER", "SAME_LOWER":
			o = (x + s - 1) / s
		case "VALID":
			span := x - ek + 1
			if span < 1 {
				return nil, c.errorf("axis %d: input %d is smaller than the effective kernel %d", i, x, ek)
			}
			o = (span + s - 1) / s
		default:
			return nil, c.errorf("auto_pad %q: expected NOTSET, SAME_UPPER, SAME_LOWER or VALID", autoPad)
		}
		out[i] = int(o)
	}
	return out, nil
}

// ruleConv: X is (N, C, D1…), W is (M, C/group, k1…), B is (M); Y is (N, M, out…).
func ruleConv(c *nodeCtx) ([]ValueShape, error) {
	x, w := c.in[0], c.in[1]
	if len(x.Shape) < 3 {
		return nil, c.errorf("expected X of rank ≥ 3 (N, C, spatial…), got %v", x.Shape)
	}
	if len(w.Shape) != len(x.Shape) {
		return nil, c.errorf("expected W of rank %d like X %v, got %v", len(x.Shape), x.Shape, w.Shape)
	}
	group := c.n.AttrInt("group", 1)
	if group < 1 {
		return nil, c.errorf("group %d: expected ≥ 1", group)
	}
	if int64(x.Shape[1]) != int64(w.Shape[1])*group {
		return nil, c.errorf("channels: X has %d, expected W's %d × group %d = %d", x.Shape[1], w.Shape[1], group, int64(w.Shape[1])*group)
	}
	m := w.Shape[0]
	if int64(m)%group != 0 {
		return nil, c.errorf("W has %d output channels: expected a multiple of group %d", m, group)
	}
	if b := c.input(2); b != nil && !slices.Equal(b.Shape, []int{m}) {
		return nil, c.errorf("bias: expected shape [%d], got %v", m, b.Shape)
	}
	kernel := c.n.AttrInts("kernel_shape", nil)
	wk := make([]int64, len(w.Shape)-2)
	for i, d := range w.Shape[2:] {
		wk[i] = int64(d)
	}
	if kernel == nil {
		kernel = wk
	} else if !slices.Equal(kernel, wk) {
		return nil, c.errorf("kernel_shape %v disagrees with W's spatial dims %v", kernel, wk)
	}
	sp, err := spatialOut(c, x.Shape[2:], kernel, false)
	if err != nil {
		return nil, err
	}
	return []ValueShape{{x.DType, append([]int{x.Shape[0], m}, sp...)}}, nil
}

// rulePool covers MaxPool (Y and the optional int64 Indices) and AveragePool.
func rulePool(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	if len(x.Shape) < 3 {
		return nil, c.errorf("expected X of rank ≥ 3 (N, C, spatial…), got %v", x.Shape)
	}
	kernel := c.n.AttrInts("kernel_shape", nil)
	if kernel == nil {
		return nil, c.errorf("expected the kernel_shape attribute, got none")
	}
	sp, err := spatialOut(c, x.Shape[2:], kernel, c.n.AttrInt("ceil_mode", 0) != 0)
	if err != nil {
		return nil, err
	}
	out := append([]int{x.Shape[0], x.Shape[1]}, sp...)
	return []ValueShape{{x.DType, out}, {Int64, slices.Clone(out)}}, nil
}

func ruleGlobalPool(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	if len(x.Shape) < 3 {
		return nil, c.errorf("expected X of rank ≥ 3 (N, C, spatial…), got %v", x.Shape)
	}
	out := []int{x.Shape[0], x.Shape[1]}
	for range x.Shape[2:] {
		out = append(out, 1)
	}
	return []ValueShape{{x.DType, out}}, nil
}

// ruleBatchNorm: Y has X's shape; scale, B, mean and var have one value per
// channel. The training outputs (running and saved mean and variance) are (C).
func ruleBatchNorm(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	if len(x.Shape) < 2 {
		return nil, c.errorf("expected X of rank ≥ 2 (N, C, …), got %v", x.Shape)
	}
	ch := x.Shape[1]
	for i, what := range []string{"scale", "B", "mean", "var"} {
		p, err := c.need(i + 1)
		if err != nil {
			return nil, err
		}
		if prod(p.Shape) != ch || len(p.Shape) > 1 && c.opset >= 7 {
			return nil, c.errorf("%s: expected shape [%d] (one per channel of X %v), got %v", what, ch, x.Shape, p.Shape)
		}
	}
	outs := []ValueShape{{x.DType, slices.Clone(x.Shape)}}
	for range 4 {
		outs = append(outs, ValueShape{x.DType, []int{ch}})
	}
	return outs, nil
}

// ruleFlatten: (d0…d_{axis−1}, d_axis…) → (d0·…·d_{axis−1}, d_axis·…); axis
// may be negative from opset 11 and equal to the rank.
func ruleFlatten(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	out, err := flattenShape(x.Shape, c.n.AttrInt("axis", 1))
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{x.DType, out}}, nil
}

func flattenShape(s []int, axis int64) ([]int, error) {
	r := int64(len(s))
	if axis < -r || axis > r {
		return nil, fmt.Errorf("axis %d out of range: expected %d to %d for input %v", axis, -r, r, s)
	}
	if axis < 0 {
		axis += r
	}
	return []int{prod(s[:axis]), prod(s[axis:])}, nil
}

// ruleReshape: 0 copies the input dim (unless allowzero=1, opset 14), one −1
// is inferred from the element count.
func ruleReshape(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	var target []int64
	if c.opset < 5 {
		target = c.n.AttrInts("shape", nil)
	} else {
		var err error
		if target, err = c.requiredInts(1, "shape"); err != nil {
			return nil, err
		}
	}
	out, err := reshapeShape(x.Shape, target, c.n.AttrInt("allowzero", 0) != 0)
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{x.DType, out}}, nil
}

func reshapeShape(in []int, target []int64, allowZero bool) ([]int, error) {
	out := make([]int, len(target))
	infer := -1
	known := int64(1)
	for i, d := range target {
		switch {
		case d == -1:
			if infer >= 0 {
				return nil, fmt.Errorf("shape %v: expected at most one -1, got two", target)
			}
			infer = i
			continue
		case d == 0 && !allowZero:
			if i >= len(in) {
				return nil, fmt.Errorf("shape %v: 0 at axis %d copies an input dim, but input %v has rank %d", target, i, in, len(in))
			}
			out[i] = in[i]
		case d < 0:
			return nil, fmt.Errorf("shape %v: expected dims ≥ -1, got %d", target, d)
		default:
			if d > DefaultLimits.MaxTensorElements {
				return nil, fmt.Errorf("shape %v: dim %d: %w", target, d, &LimitError{Limit: "MaxTensorElements", Value: d, Max: DefaultLimits.MaxTensorElements})
			}
			out[i] = int(d)
		}
		known *= int64(out[i])
		if known > DefaultLimits.MaxTensorElements {
			return nil, fmt.Errorf("shape %v: %w", target, &LimitError{Limit: "MaxTensorElements", Value: known, Max: DefaultLimits.MaxTensorElements})
		}
	}
	total := prodInt64(in)
	if infer >= 0 {
		if known == 0 || total%known != 0 {
			return nil, fmt.Errorf("cannot reshape %v (%d elements) to %v: the known dims multiply to %d", in, total, target, known)
		}
		out[infer] = int(total / known)
	} else if known != total {
		return nil, fmt.Errorf("cannot reshape %v (%d elements) to %v (%d elements)", in, total, target, known)
	}
	return out, nil
}

// ruleTranspose: out[i] = in[perm[i]]; the default perm reverses the axes.
func ruleTranspose(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	perm, err := transposePerm(x.Shape, c.n.AttrInts("perm", nil))
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	out := make([]int, len(perm))
	for i, p := range perm {
		out[i] = x.Shape[p]
	}
	return []ValueShape{{x.DType, out}}, nil
}

func transposePerm(s []int, perm []int64) ([]int, error) {
	r := len(s)
	out := make([]int, r)
	if perm == nil {
		for i := range out {
			out[i] = r - 1 - i
		}
		return out, nil
	}
	if len(perm) != r {
		return nil, fmt.Errorf("perm %v: expected a permutation of %d axes for input %v", perm, r, s)
	}
	seen := make([]bool, r)
	for i, p := range perm {
		if p < 0 || p >= int64(r) || seen[p] {
			return nil, fmt.Errorf("perm %v: expected a permutation of 0…%d", perm, r-1)
		}
		seen[p] = true
		out[i] = int(p)
	}
	return out, nil
}

// axesOf reads the axes of Squeeze, Unsqueeze and ReduceSum: an attribute
// before opset sinceInput, the optional input 1 from it. present is false when
// no axes are given at all.
func axesOf(c *nodeCtx, sinceInput int64) (axes []int64, present bool, err error) {
	if c.opset < sinceInput {
		a := c.n.Attr("axes")
		if a == nil {
			return nil, false, nil
		}
		return a.Ints, true, nil
	}
	return c.constInts(1, "axes")
}

func squeezeShape(s []int, axes []int64, present bool) ([]int, error) {
	drop := make([]bool, len(s))
	if !present {
		for i, d := range s {
			drop[i] = d == 1
		}
	}
	for _, a := range axes {
		ax, err := normAxis(a, len(s))
		if err != nil {
			return nil, err
		}
		if s[ax] != 1 {
			return nil, fmt.Errorf("axis %d of %v has size %d: expected 1 to squeeze it", a, s, s[ax])
		}
		drop[ax] = true
	}
	var out []int
	for i, d := range s {
		if !drop[i] {
			out = append(out, d)
		}
	}
	if out == nil {
		out = []int{}
	}
	return out, nil
}

func ruleSqueeze(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	axes, present, err := axesOf(c, 13)
	if err != nil {
		return nil, err
	}
	out, err := squeezeShape(x.Shape, axes, present)
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{x.DType, out}}, nil
}

// unsqueezeShape inserts 1s at axes, which index the output (rank r+len(axes)).
func unsqueezeShape(s []int, axes []int64) ([]int, error) {
	r := len(s) + len(axes)
	ins := make([]bool, r)
	for _, a := range axes {
		ax, err := normAxis(a, r)
		if err != nil {
			return nil, err
		}
		if ins[ax] {
			return nil, fmt.Errorf("axes %v: axis %d repeats", axes, a)
		}
		ins[ax] = true
	}
	out := make([]int, 0, r)
	k := 0
	for i := 0; i < r; i++ {
		if ins[i] {
			out = append(out, 1)
		} else {
			out = append(out, s[k])
			k++
		}
	}
	return out, nil
}

func ruleUnsqueeze(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	axes, present, err := axesOf(c, 13)
	if err != nil {
		return nil, err
	}
	if !present {
		return nil, c.errorf("expected axes, got none")
	}
	out, err := unsqueezeShape(x.Shape, axes)
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{x.DType, out}}, nil
}

func concatShape(shapes [][]int, axis int64) ([]int, int, error) {
	if len(shapes) == 0 {
		return nil, 0, fmt.Errorf("expected at least one input, got none")
	}
	r := len(shapes[0])
	ax, err := normAxis(axis, r)
	if err != nil {
		return nil, 0, err
	}
	out := slices.Clone(shapes[0])
	for k, s := range shapes[1:] {
		if len(s) != r {
			return nil, 0, fmt.Errorf("input %d has shape %v: expected rank %d like input 0 %v", k+1, s, r, shapes[0])
		}
		for i := range s {
			if i == ax {
				out[i] += s[i]
			} else if s[i] != out[i] {
				return nil, 0, fmt.Errorf("input %d has shape %v: expected %d at axis %d like input 0 %v", k+1, s, out[i], i, shapes[0])
			}
		}
	}
	return out, ax, nil
}

func ruleConcat(c *nodeCtx) ([]ValueShape, error) {
	var shapes [][]int
	var dt DataType
	for i := range c.n.Inputs {
		v, err := c.need(i)
		if err != nil {
			return nil, err
		}
		if i == 0 {
			dt = v.DType
		} else if v.DType != dt {
			return nil, c.errorf("input %d is %v: expected %v like input 0", i, v.DType, dt)
		}
		shapes = append(shapes, v.Shape)
	}
	a := c.n.Attr("axis")
	if a == nil && c.opset >= 4 {
		return nil, c.errorf("expected the axis attribute, got none")
	}
	axis := int64(1)
	if a != nil {
		axis = a.I
	}
	out, _, err := concatShape(shapes, axis)
	if err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{dt, out}}, nil
}

// rulePad: out[i] = in[i] + pad_begin[i] + pad_end[i]; pads are an attribute
// before opset 11 ("paddings" in opset 1) and input 1 from it. From opset 18
// the optional input 3 names the axes the pads refer to (the others are not
// padded), and from 19 the mode may be wrap.
func rulePad(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	r := len(x.Shape)
	pads, err := padsOf(c, r)
	if err != nil {
		return nil, err
	}
	mode := c.n.AttrString("mode", "constant")
	switch {
	case mode == "constant" || mode == "reflect" || mode == "edge":
	case mode == "wrap" && c.opset >= 19:
	default:
		return nil, c.errorf("mode %q: expected constant, reflect or edge (and wrap from opset 19)", mode)
	}
	out := make([]int, r)
	for i := range out {
		o := int64(x.Shape[i]) + pads[i] + pads[r+i]
		if o < 0 {
			return nil, c.errorf("pads %v: axis %d of %v would get size %d", pads, i, x.Shape, o)
		}
		out[i] = int(o)
	}
	return []ValueShape{{x.DType, out}}, nil
}

// padsOf reads the pads of a Pad node whose data has rank r, as 2r values
// (begins then ends), expanding the axes input of opset 18.
func padsOf(c *nodeCtx, r int) ([]int64, error) {
	var pads []int64
	if c.opset < 11 {
		pads = c.n.AttrInts("pads", c.n.AttrInts("paddings", nil))
	} else {
		var err error
		if pads, err = c.requiredInts(1, "pads"); err != nil {
			return nil, err
		}
		if v := c.input(2); v != nil && prod(v.Shape) != 1 {
			return nil, c.errorf("constant_value: expected one element, got shape %v", v.Shape)
		}
	}
	if c.opset >= 18 {
		axes, present, err := c.constInts(3, "axes")
		if err != nil {
			return nil, err
		}
		if present {
			if len(pads) != 2*len(axes) {
				return nil, c.errorf("pads %v: expected %d values (begins then ends) for axes %v", pads, 2*len(axes), axes)
			}
			full := make([]int64, 2*r)
			seen := make([]bool, r)
			for i, a := range axes {
				ax, err := normAxis(a, r)
				if err != nil {
					return nil, c.errorf("axes %v: %v", axes, err)
				}
				if seen[ax] {
					return nil, c.errorf("axes %v: axis %d repeats", axes, a)
				}
				seen[ax] = true
				full[ax], full[r+ax] = pads[i], pads[len(axes)+i]
			}
			return full, nil
		}
	}
	if len(pads) != 2*r {
		return nil, c.errorf("pads %v: expected %d values (begins then ends) for input %v", pads, 2*r, c.in[0].Shape)
	}
	return pads, nil
}

// ruleReduce covers ReduceMean, ReduceSum, ReduceMax, ReduceMin, ReduceL2
// and ReduceLogSumExp. Axes are an attribute before the revision that made
// them input 1 (13 for ReduceSum, 18 for the others); from that revision no
// axes, or an empty axes tensor, reduce every axis unless
// noop_with_empty_axes=1, which makes the node the identity.
func ruleReduce(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	axes, noop, err := reduceAxes(c)
	if err != nil {
		return nil, err
	}
	if noop {
		return []ValueShape{{x.DType, slices.Clone(x.Shape)}}, nil
	}
	keep := c.n.AttrInt("keepdims", 1) != 0
	red := make([]bool, len(x.Shape))
	for _, ax := range axes {
		red[ax] = true
	}
	out := []int{}
	for i, d := range x.Shape {
		switch {
		case !red[i]:
			out = append(out, d)
		case keep:
			out = append(out, 1)
		}
	}
	return []ValueShape{{x.DType, out}}, nil
}

// reduceAxes resolves the axes of a Reduce* node: in [0, rank), in the
// order given, every axis when none are named; noop reports the identity.
func reduceAxes(c *nodeCtx) (axes []int, noop bool, err error) {
	since := reduceAxesInput(c.n.OpType)
	given, _, err := axesOf(c, since)
	if err != nil {
		return nil, false, err
	}
	r := len(c.in[0].Shape)
	if len(given) == 0 {
		if c.opset >= since && c.n.AttrInt("noop_with_empty_axes", 0) != 0 {
			return nil, true, nil
		}
		for i := 0; i < r; i++ {
			axes = append(axes, i)
		}
		return axes, false, nil
	}
	seen := make([]bool, r)
	for _, a := range given {
		ax, err := normAxis(a, r)
		if err != nil {
			return nil, false, c.errorf("axes %v: %v", given, err)
		}
		if seen[ax] {
			return nil, false, c.errorf("axes %v: axis %d repeats", given, a)
		}
		seen[ax] = true
		axes = append(axes, ax)
	}
	return axes, false, nil
}

// reduceAxesInput is the opset from which op takes its axes as input 1.
func reduceAxesInput(op string) int64 {
	if op == "ReduceSum" {
		return 13
	}
	return 18
}

// ruleSoftmax: the output has the input's shape. The axis (default 1 before
// opset 13, −1 from it) must lie in [−r, r).
func ruleSoftmax(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	def := int64(-1)
	if c.opset < 13 {
		def = 1
	}
	axis := c.n.AttrInt("axis", def)
	r := len(x.Shape)
	if r == 0 && c.opset < 13 {
		return nil, c.errorf("expected an input of rank ≥ 1, got a scalar")
	}
	if _, err := normAxis(axis, max(r, 1)); err != nil {
		return nil, c.errorf("%v", err)
	}
	return []ValueShape{{x.DType, slices.Clone(x.Shape)}}, nil
}

// ruleDropout: output has the input's shape, the optional mask too (BOOL from
// opset 10, the input's type before).
func ruleDropout(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	mask := Bool
	if c.opset < 10 {
		mask = x.DType
	}
	return []ValueShape{{x.DType, slices.Clone(x.Shape)}, {mask, slices.Clone(x.Shape)}}, nil
}

func ruleCast(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	to, err := castTarget(c)
	if err != nil {
		return nil, err
	}
	return []ValueShape{{to, slices.Clone(x.Shape)}}, nil
}

// castTarget reads Cast's to attribute (an int; a type name string in opset 1–5).
func castTarget(c *nodeCtx) (DataType, error) {
	a := c.n.Attr("to")
	if a == nil {
		return 0, c.errorf("expected the to attribute, got none")
	}
	if a.Type == AttrString {
		for dt, name := range dtypeNames {
			if name == a.S {
				return dt, nil
			}
		}
		return 0, c.errorf("to %q: unknown type name", a.S)
	}
	dt := DataType(a.I)
	if sliceType(dt) == nil {
		return 0, c.errorf("to %d: expected a known element type", a.I)
	}
	return dt, nil
}

// ruleClip: the output has the input's shape; min and max are attributes
// before opset 11 and optional scalar inputs from it.
func ruleClip(c *nodeCtx) ([]ValueShape, error) {
	x := c.in[0]
	for i := 1; i <= 2; i++ {
		if v := c.input(i); v != nil && len(v.Shape) != 0 && prod(v.Shape) != 1 {
			return nil, c.errorf("input %d (%s): expected a scalar, got shape %v", i, []string{"", "min", "max"}[i], v.Shape)
		}
	}
	return []ValueShape{{x.DType, slices.Clone(x.Shape)}}, nil
}
