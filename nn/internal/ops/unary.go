package ops

import (
	"github.com/apportion/apportion/nn/internal/asm/f32"

	"fmt"
	"hash"
	"math"
	"unsafe"

	"github.com/chewxy/hm"
	"github.com/x448/float16"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// unaryFn is one entry of the unary table: y = f(x) and dy/dx from
// (x, y), with the op's two parameters.
type unaryFn struct {
	f  func(x, alpha, beta float64) float64
	df func(x, y, alpha, beta float64) float64
}

// seluAlpha and seluGamma are the ONNX Selu defaults (operator
// schema Selu-6), the constants of Klambauer et al. 2017, eq. 14.
const (
	seluAlpha = 1.67326319217681884765625
	seluGamma = 1.05070102214813232421875
)

// unaryTable holds the formulas of every unary op; alpha and beta are the
// ONNX attributes named in the comments (ONNX operator schemas, opset 13-18).
var unaryTable = map[string]unaryFn{
	// Relu: y = max(0, x).
	"Relu": {
		f: func(x, _, _ float64) float64 { return math.Max(0, x) },
		df: func(x, _, _, _ float64) float64 {
			if x > 0 {
				return 1
			}
			return 0
		},
	},
	// LeakyRelu(alpha): y = alpha·x for x < 0, x otherwise.
	"LeakyRelu": {
		f: func(x, a, _ float64) float64 {
			if x < 0 {
				return a * x
			}
			return x
		},
		df: func(x, _, a, _ float64) float64 {
			if x < 0 {
				return a
			}
			return 1
		},
	},
	// Elu(alpha): y = alpha·(eˣ - 1) for x < 0, x otherwise (Clevert et al. 2016, eq. 1);
	// dy/dx = y + alpha for x < 0.
	"Elu": {
		f: func(x, a, _ float64) float64 {
			if x < 0 {
				return a * math.Expm1(x)
			}
			return x
		},
		df: func(x, y, a, _ float64) float64 {
			if x < 0 {
				return y + a
			}
			return 1
		},
	},
	// Selu(alpha, gamma=beta): y = gamma·(alpha·eˣ - alpha) for x ≤ 0, gamma·x
	// otherwise (Klambauer et al. 2017, eq. 2).
	"Selu": {
		f: func(x, a, g float64) float64 {
			if x <= 0 {
				return g * a * math.Expm1(x)
			}
			return g * x
		},
		df: func(x, _, a, g float64) float64 {
			if x <= 0 {
				return g * a * math.Exp(x)
			}
			return g
		},
	},
	// Celu(alpha): y = max(0, x) + min(0, alpha·(exp(x/alpha) - 1)) (Barron 2017, eq. 1).
	"Celu": {
		f: func(x, a, _ float64) float64 {
			if x < 0 {
				return a * math.Expm1(x/a)
			}
			return x
		},
		df: func(x, _, a, _ float64) float64 {
			if x < 0 {
				return math.Exp(x / a)
			}
			return 1
		},
	},
	// Sigmoid: y = 1/(1 + e⁻ˣ); dy/dx = y(1 - y).
	"Sigmoid": {
		f:  func(x, _, _ float64) float64 { return sigmoid(x) },
		df: func(_, y, _, _ float64) float64 { return y * (1 - y) },
	},
	// HardSigmoid(alpha, beta): y = max(0, min(1, alpha·x + beta)).
	"HardSigmoid": {
		f: func(x, a, b float64) float64 { return math.Max(0, math.Min(1, a*x+b)) },
		df: func(x, _, a, b float64) float64 {
			if t := a*x + b; t > 0 && t < 1 {
				return a
			}
			return 0
		},
	},
	// HardSwish: y = x·max(0, min(1, x/6 + 1/2)) (Howard et al. 2019, eq. 2 as ONNX
	// HardSwish-14 writes it); dy/dx = x/3 + 1/2 on -3 < x < 3.
	"HardSwish": {
		f: func(x, _, _ float64) float64 { return x * math.Max(0, math.Min(1, x/6+0.5)) },
		df: func(x, _, _, _ float64) float64 {
			switch {
			case x <= -3:
				return 0
			case x >= 3:
				return 1
			}
			return x/3 + 0.5
		},
	},
	// Tanh: dy/dx = 1 - y².
	"Tanh": {
		f:  func(x, _, _ float64) float64 { return math.Tanh(x) },
		df: func(_, y, _, _ float64) float64 { return 1 - y*y },
	},
	// Softplus: y = log(eˣ + 1) = max(x, 0) + log1p(e^-|x|), which neither
	// overflows nor loses the small tail; dy/dx = sigmoid(x).
	"Softplus": {
		f:  func(x, _, _ float64) float64 { return softplus(x) },
		df: func(x, _, _, _ float64) float64 { return sigmoid(x) },
	},
	// Softsign: y = x/(1 + |x|); dy/dx = 1/(1 + |x|)².
	"Softsign": {
		f: func(x, _, _ float64) float64 { return x / (1 + math.Abs(x)) },
		df: func(x, _, _, _ float64) float64 {
			d := 1 + math.Abs(x)
			return 1 / (d * d)
		},
	},
	// Erf: dy/dx = 2/√π · e^(-x²).
	"Erf": {
		f:  func(x, _, _ float64) float64 { return math.Erf(x) },
		df: func(x, _, _, _ float64) float64 { return 2 / math.SqrtPi * math.Exp(-x*x) },
	},
	// Abs: dy/dx = sign(x), 0 at 0.
	"Abs": {
		f: func(x, _, _ float64) float64 { return math.Abs(x) },
		df: func(x, _, _, _ float64) float64 {
			switch {
			case x > 0:
				return 1
			case x < 0:
				return -1
			}
			return 0
		},
	},
	// Sqrt: dy/dx = 1/(2y).
	"Sqrt": {
		f:  func(x, _, _ float64) float64 { return math.Sqrt(x) },
		df: func(_, y, _, _ float64) float64 { return 0.5 / y },
	},
	"Exp": {
		f:  func(x, _, _ float64) float64 { return math.Exp(x) },
		df: func(_, y, _, _ float64) float64 { return y },
	},
	"Log": {
		f:  func(x, _, _ float64) float64 { return math.Log(x) },
		df: func(x, _, _, _ float64) float64 { return 1 / x },
	},
	"Neg": {
		f:  func(x, _, _ float64) float64 { return -x },
		df: func(_, _, _, _ float64) float64 { return -1 },
	},
	// Pow with a constant exponent alpha: y = x^alpha; dy/dx = alpha·x^(alpha-1).
	"Pow": {
		f: func(x, a, _ float64) float64 { return math.Pow(x, a) },
		df: func(x, _, a, _ float64) float64 {
			if a == 0 {
				return 0
			}
			return a * math.Pow(x, a-1)
		},
	},
	"Identity": {
		f:  func(x, _, _ float64) float64 { return x },
		df: func(_, _, _, _ float64) float64 { return 1 },
	},
	// Gelu (approximate "none"): y = x·Φ(x) = x/2·(1 + erf(x/√2))
	// (Hendrycks & Gimpel 2016, eq. 1); dy/dx = Φ(x) + x·φ(x).
	"Gelu": {
		f: func(x, _, _ float64) float64 { return 0.5 * x * (1 + math.Erf(x/math.Sqrt2)) },
		df: func(x, _, _, _ float64) float64 {
			return 0.5*(1+math.Erf(x/math.Sqrt2)) + x*math.Exp(-x*x/2)/math.Sqrt(2*math.Pi)
		},
	},
	// GeluTanh (Gelu with approximate "tanh"): y = x/2·(1 + tanh(u)),
	// u = √(2/π)·(x + 0.044715x³) (Hendrycks & Gimpel 2016, section 2);
	// dy/dx = (1 + t)/2 + x/2·(1 − t²)·√(2/π)·(1 + 3·0.044715x²), t = tanh(u).
	"GeluTanh": {
		f: func(x, _, _ float64) float64 {
			return 0.5 * x * (1 + math.Tanh(math.Sqrt(2/math.Pi)*(x+0.044715*x*x*x)))
		},
		df: func(x, _, _, _ float64) float64 {
			k := math.Sqrt(2 / math.Pi)
			t := math.Tanh(k * (x + 0.044715*x*x*x))
			return 0.5*(1+t) + 0.5*x*(1-t*t)*k*(1+3*0.044715*x*x)
		},
	},
	// Mish: y = x·tanh(softplus(x)) (Misra 2019, eq. 1);
	// dy/dx = tanh(s) + x·(1 − tanh²(s))·sigmoid(x), s = softplus(x).
	"Mish": {
		f: func(x, _, _ float64) float64 { return x * math.Tanh(softplus(x)) },
		df: func(x, _, _, _ float64) float64 {
			t := math.Tanh(softplus(x))
			return t + x*(1-t*t)*sigmoid(x)
		},
	},
	// ThresholdedRelu(alpha): y = x for x > alpha, 0 otherwise.
	"ThresholdedRelu": {
		f: func(x, a, _ float64) float64 {
			if x > a {
				return x
			}
			return 0
		},
		df: func(x, _, a, _ float64) float64 {
			if x > a {
				return 1
			}
			return 0
		},
	},
	// Reciprocal: y = 1/x; dy/dx = −y².
	"Reciprocal": {
		f:  func(x, _, _ float64) float64 { return 1 / x },
		df: func(_, y, _, _ float64) float64 { return -y * y },
	},
	// Sign, Floor, Ceil and Round (half to even, ONNX Round-11) are
	// piecewise constant: their derivative is 0 wherever it exists, and
	// the backward passes 0 at the jumps too (common practice: PyTorch's
	// sign, floor, ceil and round backward return zeros).
	"Sign": {
		f: func(x, _, _ float64) float64 {
			switch {
			case x > 0:
				return 1
			case x < 0:
				return -1
			}
			return x // ±0 and NaN
		},
		df: zeroDerivative,
	},
	"Floor": {f: func(x, _, _ float64) float64 { return math.Floor(x) }, df: zeroDerivative},
	"Ceil":  {f: func(x, _, _ float64) float64 { return math.Ceil(x) }, df: zeroDerivative},
	"Round": {f: func(x, _, _ float64) float64 { return math.RoundToEven(x) }, df: zeroDerivative},
	// Cast to an integer type of a floating-point value: truncation toward
	// zero, with no derivative (an integer carries none).
	"CastInt": {f: func(x, _, _ float64) float64 { return math.Trunc(x) }, df: zeroDerivative},
	// Cast to BOOL: 1 where x ≠ 0 (NaN included), 0 elsewhere.
	"CastBool": {
		f: func(x, _, _ float64) float64 {
			if x != 0 {
				return 1
			}
			return 0
		},
		df: zeroDerivative,
	},
	// Casts to a narrower floating-point type round to nearest, ties to
	// even (IEEE 754 §4.3.1). The derivative is 1, as in PyTorch, whose
	// autograd passes the gradient through a change of dtype (common
	// practice): the rounding is a change of representation, not of the
	// function the model computes.
	"CastFloat": {
		f:  func(x, _, _ float64) float64 { return float64(float32(x)) },
		df: func(_, _, _, _ float64) float64 { return 1 },
	},
	"CastFloat16": {
		f:  func(x, _, _ float64) float64 { return float64(float16.Fromfloat32(float32(x)).Float32()) },
		df: func(_, _, _, _ float64) float64 { return 1 },
	},
	"CastBFloat16": {
		f:  func(x, _, _ float64) float64 { return float64(bfloat16(float32(x))) },
		df: func(_, _, _, _ float64) float64 { return 1 },
	},
	// Clip(lo=alpha, hi=beta): y = min(max(x, lo), hi). The gradient passes
	// where lo ≤ x ≤ hi, both kinks included (common practice).
	"Clip": {
		f: func(x, lo, hi float64) float64 { return math.Min(math.Max(x, lo), hi) },
		df: func(x, _, lo, hi float64) float64 {
			if x >= lo && x <= hi {
				return 1
			}
			return 0
		},
	},
}

// zeroDerivative is the derivative of the piecewise-constant functions.
func zeroDerivative(_, _, _, _ float64) float64 { return 0 }

// softplus is log(1 + eˣ) = max(x, 0) + log1p(e^−|x|), which neither
// overflows nor loses the small tail.
func softplus(x float64) float64 { return math.Max(x, 0) + math.Log1p(math.Exp(-math.Abs(x))) }

// bfloat16 rounds x to the nearest bfloat16, ties to even: the upper 16
// bits of its binary32 pattern after adding half an ulp of bfloat16 (the
// rounding ONNX Runtime's and PyTorch's conversions use, from memory).
// NaN stays a NaN.
func bfloat16(x float32) float32 {
	if x != x {
		return x
	}
	b := math.Float32bits(x)
	b += 0x7fff + (b>>16)&1
	return math.Float32frombits(b &^ 0xffff)
}

// sigmoid is 1/(1 + e⁻ˣ), evaluated without overflow for large |x|.
func sigmoid(x float64) float64 {
	if x >= 0 {
		return 1 / (1 + math.Exp(-x))
	}
	e := math.Exp(x)
	return e / (1 + e)
}

// Unary applies the ONNX elementwise op named op: Relu, LeakyRelu(alpha),
// Elu(alpha), Selu(alpha, gamma=beta), Celu(alpha), Sigmoid,
// HardSigmoid(alpha, beta), HardSwish, Tanh, Softplus, Softsign, Erf, Abs,
// Sqrt, Exp, Log, Neg, Pow (constant exponent alpha), Identity, Gelu,
// GeluTanh (Gelu with approximate tanh), Mish, ThresholdedRelu(alpha),
// Reciprocal, Sign, Floor, Ceil, Round; and the casts of a run-time value:
// CastInt (truncation toward zero), CastBool, CastFloat, CastFloat16,
// CastBFloat16 (rounding to the narrower type).
//
// The caller passes the ONNX defaults for absent attributes (LeakyRelu 0.01,
// Elu 1, Celu 1, Selu 1.67326319217681884765625 and 1.05070102214813232421875,
// HardSigmoid 0.2 and 0.5, ThresholdedRelu 1); parameters that an op does
// not use are ignored.
func Unary(x *G.Node, op string, alpha, beta float64) (*G.Node, error) {
	if op == "Clip" {
		return nil, fmt.Errorf("nn: unary op %q: use clip: %w", op, errUnknownOp)
	}
	return applyUnary(x, op, alpha, beta)
}

// clip applies ONNX Clip: y = min(max(x, lo), hi), with -Inf/+Inf when a
// bound is absent. The gradient is 1 where lo ≤ x ≤ hi and 0 elsewhere.
func Clip(x *G.Node, lo, hi float64) (*G.Node, error) {
	if math.IsNaN(lo) || math.IsNaN(hi) {
		return nil, fmt.Errorf("nn: Clip: bounds [%v, %v]: want numbers, got NaN", lo, hi)
	}
	return applyUnary(x, "Clip", lo, hi)
}

func applyUnary(x *G.Node, op string, alpha, beta float64) (out *G.Node, err error) {
	if x == nil {
		return nil, fmt.Errorf("nn: %s: nil operand", op)
	}
	if _, ok := unaryTable[op]; !ok {
		return nil, fmt.Errorf("nn: unary op %q: %w", op, errUnknownOp)
	}
	if math.IsNaN(alpha) || math.IsNaN(beta) {
		return nil, fmt.Errorf("nn: %s: parameters (%v, %v): want numbers, got NaN", op, alpha, beta)
	}
	if op == "Celu" && alpha == 0 {
		return nil, fmt.Errorf("nn: Celu: alpha must be non-zero, got 0")
	}
	dt, err := dtypeOf(op, x)
	if err != nil {
		return nil, err
	}
	u := &unaryOp{kind: op, alpha: alpha, beta: beta, dt: dt, shape: x.Shape(), t: x.Type()}
	return G.ApplyOp(u, x)
}

// unaryOp is the forward op of unary and clip.
type unaryOp struct {
	kind        string
	alpha, beta float64
	dt          tensor.Dtype
	shape       tensor.Shape
	t           hm.Type
}

func (op *unaryOp) Arity() int           { return 1 }
func (op *unaryOp) Type() hm.Type        { return hm.NewFnType(op.t, op.t) }
func (op *unaryOp) ReturnsPtr() bool     { return true }
func (op *unaryOp) CallsExtern() bool    { return false }
func (op *unaryOp) OverwritesInput() int { return 0 }
func (op *unaryOp) String() string {
	return fmt.Sprintf("%s(%g,%g)", op.kind, op.alpha, op.beta)
}
func (op *unaryOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.%s(%v,%v)%v%v", op.kind, op.alpha, op.beta, op.dt, op.shape)
}
func (op *unaryOp) Hashcode() uint32 { return hashOp(op) }
func (op *unaryOp) InferShape(...G.DimSizer) (tensor.Shape, error) {
	return op.shape.Clone(), nil
}
func (op *unaryOp) DiffWRT(int) []bool { return []bool{true} }

func (op *unaryOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 1 {
		return nil, fmt.Errorf("nn: %s gradient: got %d inputs, want 1", op.kind, len(inputs))
	}
	if op.kind == "Relu" {
		// y > 0 exactly where x > 0 (y = max(0, x) is x there, and +0 or
		// NaN elsewhere), so the backward needs y only and x's buffer is
		// free once y is computed.
		d, err := G.ApplyOp(&reluDiffOp{op}, output, grad)
		if err != nil {
			return nil, fmt.Errorf("nn: %s gradient: %w", op.kind, err)
		}
		return G.Nodes{d}, nil
	}
	d, err := G.ApplyOp(&unaryDiffOp{op}, inputs[0], output, grad)
	if err != nil {
		return nil, fmt.Errorf("nn: %s gradient: %w", op.kind, err)
	}
	return G.Nodes{d}, nil
}

func (op *unaryOp) Do(vs ...G.Value) (G.Value, error) { return op.UsePreallocDo(nil, vs...) }

// UnsafeDo writes over the input.
func (op *unaryOp) UnsafeDo(vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 1", op.kind, len(vs))
	}
	return op.UsePreallocDo(vs[0], vs...)
}

func (op *unaryOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 1 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 1", op.kind, len(vs))
	}
	if op.dt == tensor.Float32 {
		return unaryRun[float32](op, p, vs[0])
	}
	return unaryRun[float64](op, p, vs[0])
}

func unaryRun[T float](op *unaryOp, p, xv G.Value) (G.Value, error) {
	x, err := valuesOf[T](op.kind, xv, op.shape)
	if err != nil {
		return nil, err
	}
	v, y := allocOutput[T](p, op.dt, op.shape, []span{spanOf(x)})
	a, b := op.alpha, op.beta
	switch op.kind {
	case "Relu": // the hot one: no float64 round trip
		if y32, ok := any(y).([]float32); ok {
			f32.Relu(y32, any(x).([]float32))
		} else {
			relu(y, x)
		}
	case "Identity":
		copy(y, x)
	default:
		f := unaryTable[op.kind].f
		for i, xi := range x {
			y[i] = T(f(float64(xi), a, b))
		}
	}
	return wrap(v, y), nil
}

// unaryDiffOp computes dL/dx = dL/dy · f'(x) from (x, y, dL/dy).
type unaryDiffOp struct{ *unaryOp }

func (op *unaryDiffOp) Arity() int           { return 3 }
func (op *unaryDiffOp) OverwritesInput() int { return 2 }
func (op *unaryDiffOp) Type() hm.Type        { return hm.NewFnType(op.t, op.t, op.t, op.t) }
func (op *unaryDiffOp) String() string       { return "∂" + op.unaryOp.String() }
func (op *unaryDiffOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.d%s(%v,%v)%v%v", op.kind, op.alpha, op.beta, op.dt, op.shape)
}
func (op *unaryDiffOp) Hashcode() uint32 { return hashOp(op) }
func (op *unaryDiffOp) Do(vs ...G.Value) (G.Value, error) {
	return op.UsePreallocDo(nil, vs...)
}

func (op *unaryDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 3 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 3", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return unaryDiffRun[float32](op, p, vs)
	}
	return unaryDiffRun[float64](op, p, vs)
}

func unaryDiffRun[T float](op *unaryDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	var in [3][]T
	for i, v := range vs {
		d, err := valuesOf[T](op.kind, v, op.shape)
		if err != nil {
			return nil, err
		}
		in[i] = d
	}
	x, y, g := in[0], in[1], in[2]
	// Element i reads only x[i], y[i] and g[i] before writing d[i], so the
	// output may be any of the inputs.
	v, d := allocOutput[T](p, op.dt, op.shape, []span{spanOf(x), spanOf(y), spanOf(g)})
	a, b := op.alpha, op.beta
	switch op.kind {
	case "Relu":
		if d32, ok := any(d).([]float32); ok {
			f32.ReluGrad(d32, any(x).([]float32), any(g).([]float32))
		} else {
			reluDiff(d, x, g)
		}
	case "Identity":
		copy(d, g)
	default:
		df := unaryTable[op.kind].df
		for i, xi := range x {
			d[i] = g[i] * T(df(float64(xi), float64(y[i]), a, b))
		}
	}
	return wrap(v, d), nil
}

// reluDiffOp computes dL/dx = dL/dy where y > 0 and 0 elsewhere from
// (y, dL/dy), y = Relu(x); the same values as unaryDiffOp's from x.
type reluDiffOp struct{ *unaryOp }

func (op *reluDiffOp) Arity() int           { return 2 }
func (op *reluDiffOp) OverwritesInput() int { return 1 }
func (op *reluDiffOp) Type() hm.Type        { return hm.NewFnType(op.t, op.t, op.t) }
func (op *reluDiffOp) String() string       { return "∂Relu(y)" }
func (op *reluDiffOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "elem.dReluY%v%v", op.dt, op.shape)
}
func (op *reluDiffOp) Hashcode() uint32 { return hashOp(op) }
func (op *reluDiffOp) Do(vs ...G.Value) (G.Value, error) {
	return op.UsePreallocDo(nil, vs...)
}

// UsePreallocDo writes into p when it fits (see the package doc).
func (op *reluDiffOp) UsePreallocDo(p G.Value, vs ...G.Value) (G.Value, error) {
	if len(vs) != 2 {
		return nil, fmt.Errorf("nn: %s: got %d inputs, want 2", op, len(vs))
	}
	if op.dt == tensor.Float32 {
		return reluDiffRun[float32](op, p, vs)
	}
	return reluDiffRun[float64](op, p, vs)
}

func reluDiffRun[T float](op *reluDiffOp, p G.Value, vs []G.Value) (G.Value, error) {
	y, err := valuesOf[T]("Relu gradient", vs[0], op.shape)
	if err != nil {
		return nil, err
	}
	g, err := valuesOf[T]("Relu gradient", vs[1], op.shape)
	if err != nil {
		return nil, err
	}
	v, d := allocOutput[T](p, op.dt, op.shape, []span{spanOf(y), spanOf(g)})
	if d32, ok := any(d).([]float32); ok {
		f32.ReluGrad(d32, any(y).([]float32), any(g).([]float32))
	} else {
		reluDiff(d, y, g)
	}
	return wrap(v, d), nil
}

// dtypeOf returns the element type of n, or an error unless it is float32
// or float64.
func dtypeOf(op string, n *G.Node) (tensor.Dtype, error) {
	dt, ok := ElemType(n)
	if !ok {
		return dt, fmt.Errorf("nn: %s: operand %v has no element type", op, n)
	}
	if dt != tensor.Float32 && dt != tensor.Float64 {
		return dt, fmt.Errorf("nn: %s: element type %v: %w (want float32 or float64)", op, dt, errDtype)
	}
	return dt, nil
}

// ElemType returns the element type of n's values, and false when its
// type has none (a type variable), where gorgonia's Node.Dtype panics.
func ElemType(n *G.Node) (tensor.Dtype, bool) {
	t := n.Type()
	for {
		switch p := t.(type) {
		case tensor.Dtype:
			return p, true
		case G.TensorType:
			t = p.Of
		case *G.TensorType:
			t = p.Of
		default:
			return tensor.Dtype{}, false
		}
	}
}

// nodeType is the gorgonia type of a value of the given rank.
func nodeType(dt tensor.Dtype, rank int) hm.Type {
	if rank == 0 {
		return dt
	}
	return G.TensorType{Dims: rank, Of: dt}
}

// valuesOf returns the elements of v, a *tensor.Dense or a scalar, after
// checking its element type and size against shape.
func valuesOf[T float](op string, v G.Value, shape []int) ([]T, error) {
	var z T
	var out []T
	switch t := v.(type) {
	case *tensor.Dense:
		if t.RequiresIterator() {
			m, ok := t.Materialize().(*tensor.Dense)
			if !ok {
				return nil, fmt.Errorf("nn: %s: cannot read a %T view", op, t)
			}
			t = m
		}
		d, ok := denseData[T](t)
		if !ok {
			return nil, fmt.Errorf("nn: %s: operand holds %v, want %T", op, t.Dtype(), z)
		}
		out = d
	case *G.F64:
		s, ok := any(float64(*t)).(T)
		if !ok {
			return nil, fmt.Errorf("nn: %s: operand is float64, want %T", op, z)
		}
		out = []T{s}
	case *G.F32:
		s, ok := any(float32(*t)).(T)
		if !ok {
			return nil, fmt.Errorf("nn: %s: operand is float32, want %T", op, z)
		}
		out = []T{s}
	case nil:
		return nil, fmt.Errorf("nn: %s: operand has no value", op)
	default:
		return nil, fmt.Errorf("nn: %s: operand is a %T, want a float tensor", op, v)
	}
	if n := shapeSize(shape); len(out) != n {
		return nil, fmt.Errorf("nn: %s: operand has %d elements, want %d for shape %v", op, len(out), n, shape)
	}
	return out, nil
}

// allocOutput returns an output value of the given shape and its elements:
// p when writable allows it (inPlace and ins as for mayWrite), a new
// tensor otherwise. A rank-0 shape gives a nil value and a one-element
// buffer that wrap turns into a scalar.
func allocOutput[T float](p G.Value, dt tensor.Dtype, shape []int, inPlace []span, ins ...span) (G.Value, []T) {
	if len(shape) == 0 {
		return nil, make([]T, 1)
	}
	if t := writable(p, dt, shape, inPlace, ins...); t != nil {
		if d, ok := denseData[T](t); ok {
			return t, d
		}
	}
	t := tensor.New(tensor.Of(dt), tensor.WithShape(append([]int(nil), shape...)...))
	d, _ := denseData[T](t)
	return t, d
}

// sortOperands sorts up to three operands of an elementwise op for
// mayWrite: those of n elements, the output's size, which it reads element
// by element in step with its writes, into same; the broadcast ones into
// other. Unused entries are zero spans.
func sortOperands[T float](n int, xs ...[]T) (same, other [3]span) {
	for i, x := range xs {
		if len(x) == n {
			same[i] = spanOf(x)
		} else {
			other[i] = spanOf(x)
		}
	}
	return same, other
}

// denseData returns the backing array of t when it holds elements of type
// T, without the allocations of (*tensor.Dense).Data, which builds the
// slice through reflection on every call.
func denseData[T float](t *tensor.Dense) ([]T, bool) {
	var z T
	switch {
	case unsafe.Sizeof(z) == 4 && t.Dtype() == tensor.Float32:
		f := t.Float32s()
		return unsafe.Slice((*T)(unsafe.Pointer(unsafe.SliceData(f))), len(f)), true
	case unsafe.Sizeof(z) == 8 && t.Dtype() == tensor.Float64:
		f := t.Float64s()
		return unsafe.Slice((*T)(unsafe.Pointer(unsafe.SliceData(f))), len(f)), true
	}
	return nil, false
}

// wrap returns v, or the scalar in buf[0] when v is nil.
func wrap[T float](v G.Value, buf []T) G.Value {
	if v != nil {
		return v
	}
	switch s := any(buf[0]).(type) {
	case float32:
		return G.NewF32(s)
	case float64:
		return G.NewF64(s)
	}
	return G.NewF64(float64(buf[0]))
}
