package engine

// More elementwise operators that exported classifiers and the ONNX
// "expanded" function bodies use: the rest of the unary math functions,
// variadic Max/Min/Sum/Mean, comparisons and logic, Mod, IsNaN/IsInf.

import (
	"fmt"
	"math"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	for name, u := range simpleUnary {
		register(name, unaryBuilder(u))
	}
	register("Elu", buildElu)
	register("Selu", buildSelu)
	register("Celu", buildCelu)
	register("ThresholdedRelu", buildThresholdedRelu)
	register("Max", buildVariadic(varMax))
	register("Min", buildVariadic(varMin))
	register("Sum", buildVariadic(varSum))
	register("Mean", buildVariadic(varMean))
	register("Greater", buildCompare(cmpGreater))
	register("Less", buildCompare(cmpLess))
	register("GreaterOrEqual", buildCompare(cmpGreaterEq))
	register("LessOrEqual", buildCompare(cmpLessEq))
	register("And", buildCompare(cmpAnd))
	register("Or", buildCompare(cmpOr))
	register("Xor", buildCompare(cmpXor))
	register("Not", buildNot)
	register("Mod", buildMod)
	register("IsNaN", buildIsNaN)
	register("IsInf", buildIsInf)
}

func f64(f func(float64) float64) func(float32) float32 {
	return func(x float32) float32 { return float32(f(float64(x))) }
}

func zeroGrad(_, _ float32) float32 { return 0 }

// simpleUnary are attribute-free unary ops. Floor, Ceil, Round and Sign are
// piecewise constant: their gradient is zero almost everywhere.
var simpleUnary = map[string]*unaryOp{
	"Neg":   {name: "Neg", f: func(x float32) float32 { return -x }, df: func(_, _ float32) float32 { return -1 }, i64: func(x int64) int64 { return -x }},
	"Abs":   {name: "Abs", f: func(x float32) float32 { return float32(math.Abs(float64(x))) }, df: func(x, _ float32) float32 { return signF32(x) }, i64: func(x int64) int64 { return max(x, -x) }, useIn: true},
	"Sign":  {name: "Sign", f: signF32, df: zeroGrad, i64: func(x int64) int64 { return int64(signF32(float32(x))) }},
	"Floor": {name: "Floor", f: f64(math.Floor), df: zeroGrad},
	"Ceil":  {name: "Ceil", f: f64(math.Ceil), df: zeroGrad},
	// ONNX Round rounds halves to even, like numpy.round.
	"Round":      {name: "Round", f: f64(math.RoundToEven), df: zeroGrad},
	"Reciprocal": {name: "Reciprocal", f: func(x float32) float32 { return 1 / x }, df: func(_, y float32) float32 { return -y * y }, useOut: true},
	"Log":        {name: "Log", f: f64(math.Log), df: func(x, _ float32) float32 { return 1 / x }, useIn: true},
	"Sin":        {name: "Sin", f: f64(math.Sin), df: func(x, _ float32) float32 { return float32(math.Cos(float64(x))) }, useIn: true},
	"Cos":        {name: "Cos", f: f64(math.Cos), df: func(x, _ float32) float32 { return float32(-math.Sin(float64(x))) }, useIn: true},
	"Tan":        {name: "Tan", f: f64(math.Tan), df: func(_, y float32) float32 { return 1 + y*y }, useOut: true},
	"Asin":       {name: "Asin", f: f64(math.Asin), df: func(x, _ float32) float32 { return float32(1 / math.Sqrt(1-float64(x)*float64(x))) }, useIn: true},
	"Acos":       {name: "Acos", f: f64(math.Acos), df: func(x, _ float32) float32 { return float32(-1 / math.Sqrt(1-float64(x)*float64(x))) }, useIn: true},
	"Atan":       {name: "Atan", f: f64(math.Atan), df: func(x, _ float32) float32 { return float32(1 / (1 + float64(x)*float64(x))) }, useIn: true},
	"Sinh":       {name: "Sinh", f: f64(math.Sinh), df: func(x, _ float32) float32 { return float32(math.Cosh(float64(x))) }, useIn: true},
	"Cosh":       {name: "Cosh", f: f64(math.Cosh), df: func(x, _ float32) float32 { return float32(math.Sinh(float64(x))) }, useIn: true},
	"Asinh":      {name: "Asinh", f: f64(math.Asinh), df: func(x, _ float32) float32 { return float32(1 / math.Sqrt(float64(x)*float64(x)+1)) }, useIn: true},
	"Acosh":      {name: "Acosh", f: f64(math.Acosh), df: func(x, _ float32) float32 { return float32(1 / math.Sqrt(float64(x)*float64(x)-1)) }, useIn: true},
	"Atanh":      {name: "Atanh", f: f64(math.Atanh), df: func(x, _ float32) float32 { return float32(1 / (1 - float64(x)*float64(x))) }, useIn: true},
	// Softplus = log(1+e^x), evaluated without overflow for large x.
	"Softplus": {name: "Softplus", f: f64(func(x float64) float64 { return math.Max(x, 0) + math.Log1p(math.Exp(-math.Abs(x))) }),
		df: func(x, _ float32) float32 { return float32(1 / (1 + math.Exp(-float64(x)))) }, useIn: true},
	"Softsign": {name: "Softsign", f: func(x float32) float32 { return x / (1 + float32(math.Abs(float64(x)))) },
		df: func(x, _ float32) float32 { d := 1 + float32(math.Abs(float64(x))); return 1 / (d * d) }, useIn: true},
}

func signF32(x float32) float32 {
	switch {
	case x > 0:
		return 1
	case x < 0:
		return -1
	}
	return 0
}

// unaryBuilder returns a builder handing out the shared, immutable op.
func unaryBuilder(u *unaryOp) Builder {
	return func(n *onnx.Node, env *Env) (Op, error) { return u, nil }
}

func buildElu(n *onnx.Node, env *Env) (Op, error) {
	alpha := float64(n.Float("alpha", 1))
	return &unaryOp{name: "Elu",
		f: f64(func(x float64) float64 {
			if x >= 0 {
				return x
			}
			return alpha * math.Expm1(x)
		}),
		df: func(x, _ float32) float32 {
			if x >= 0 {
				return 1
			}
			return float32(alpha * math.Exp(float64(x)))
		}, useIn: true}, nil
}

// Selu defaults are the constants of Klambauer et al., "Self-Normalizing
// Neural Networks", NeurIPS 2017, as the ONNX operator states them.
func buildSelu(n *onnx.Node, env *Env) (Op, error) {
	alpha := float64(n.Float("alpha", 1.67326319217681884765625))
	gamma := float64(n.Float("gamma", 1.05070102214813232421875))
	return &unaryOp{name: "Selu",
		f: f64(func(x float64) float64 {
			if x > 0 {
				return gamma * x
			}
			return gamma * alpha * math.Expm1(x)
		}),
		df: func(x, _ float32) float32 {
			if x > 0 {
				return float32(gamma)
			}
			return float32(gamma * alpha * math.Exp(float64(x)))
		}, useIn: true}, nil
}

func buildCelu(n *onnx.Node, env *Env) (Op, error) {
	alpha := float64(n.Float("alpha", 1))
	if alpha == 0 {
		return nil, fmt.Errorf("Celu: alpha must be non-zero")
	}
	return &unaryOp{name: "Celu",
		f: f64(func(x float64) float64 {
			return math.Max(0, x) + math.Min(0, alpha*math.Expm1(x/alpha))
		}),
		df: func(x, _ float32) float32 {
			if x > 0 {
				return 1
			}
			return float32(math.Exp(float64(x) / alpha))
		}, useIn: true}, nil
}

func buildThresholdedRelu(n *onnx.Node, env *Env) (Op, error) {
	alpha := n.Float("alpha", 1)
	return &unaryOp{name: "ThresholdedRelu",
		f: func(x float32) float32 {
			if x > alpha {
				return x
			}
			return 0
		},
		df: func(x, _ float32) float32 {
			if x > alpha {
				return 1
			}
			return 0
		}, useIn: true}, nil
}

// ---------------------------------------------------------------------------
// Variadic Max, Min, Sum, Mean with broadcasting.

type varKind uint8

const (
	varMax varKind = iota
	varMin
	varSum
	varMean
)

var varNames = [...]string{"Max", "Min", "Sum", "Mean"}

type variadicOp struct{ kind varKind }

func buildVariadic(k varKind) Builder {
	return func(n *onnx.Node, env *Env) (Op, error) { return &variadicOp{kind: k}, nil }
}

func (v *variadicOp) shapes(in []*tensor.Tensor) ([]int, [][]int, error) {
	name := varNames[v.kind]
	if len(in) == 0 {
		return nil, nil, fmt.Errorf("%s: no inputs", name)
	}
	shapes := make([][]int, len(in))
	for i, t := range in {
		if t == nil {
			return nil, nil, fmt.Errorf("%s: input %d missing", name, i)
		}
		if (t.DType == tensor.Float32) != (in[0].DType == tensor.Float32) {
			return nil, nil, fmt.Errorf("%s: mixed element types", name)
		}
		shapes[i] = t.Shape
	}
	out, err := broadcastShapes(shapes...)
	if err != nil {
		return nil, nil, fmt.Errorf("%s: %v", name, err)
	}
	return out, shapes, nil
}

func (v *variadicOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	out, shapes, err := v.shapes(in)
	if err != nil {
		return nil, err
	}
	p, err := newBcastPlan(out, shapes...)
	if err != nil {
		return nil, err
	}
	if in[0].DType == tensor.Float32 {
		y := tensor.New(out...)
		p.rows(func(o int, offs, steps []int, n int) {
			for i := 0; i < n; i++ {
				acc := in[0].F32[offs[0]+i*steps[0]]
				for k := 1; k < len(in); k++ {
					x := in[k].F32[offs[k]+i*steps[k]]
					switch v.kind {
					case varMax:
						if x > acc || x != x {
							acc = x
						}
					case varMin:
						if x < acc || x != x {
							acc = x
						}
					default:
						acc += x
					}
				}
				if v.kind == varMean {
					acc /= float32(len(in))
				}
				y.F32[o+i] = acc
			}
		})
		return []*tensor.Tensor{y}, nil
	}
	y := &tensor.Tensor{DType: in[0].DType, Shape: out, I64: make([]int64, tensor.Numel(out))}
	p.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			acc := in[0].I64[offs[0]+i*steps[0]]
			for k := 1; k < len(in); k++ {
				x := in[k].I64[offs[k]+i*steps[k]]
				switch v.kind {
				case varMax:
					acc = max(acc, x)
				case varMin:
					acc = min(acc, x)
				default:
					acc += x
				}
			}
			if v.kind == varMean {
				acc /= int64(len(in))
			}
			y.I64[o+i] = acc
		}
	})
	return []*tensor.Tensor{y}, nil
}

// Backward: Sum and Mean spread the gradient to every input; Max and Min
// route it to the first input attaining the extreme (a subgradient).
func (v *variadicOp) Backward(in, outs, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads, g := floatBackward(in, gradOut)
	if g == nil {
		return grads, nil
	}
	out, shapes, err := v.shapes(in)
	if err != nil {
		return nil, err
	}
	full := make([][]float32, len(in))
	for k := range full {
		full[k] = make([]float32, len(g.F32))
	}
	switch v.kind {
	case varSum, varMean:
		scale := float32(1)
		if v.kind == varMean {
			scale = 1 / float32(len(in))
		}
		for k := range full {
			for i, gv := range g.F32 {
				full[k][i] = gv * scale
			}
		}
	default:
		p, err := newBcastPlan(out, shapes...)
		if err != nil {
			return nil, err
		}
		p.rows(func(o int, offs, steps []int, n int) {
			for i := 0; i < n; i++ {
				best, arg := in[0].F32[offs[0]+i*steps[0]], 0
				for k := 1; k < len(in); k++ {
					x := in[k].F32[offs[k]+i*steps[k]]
					if (v.kind == varMax && x > best) || (v.kind == varMin && x < best) {
						best, arg = x, k
					}
				}
				full[arg][o+i] = g.F32[o+i]
			}
		})
	}
	for k := range in {
		r, err := reduceToShape(full[k], out, shapes[k])
		if err != nil {
			return nil, err
		}
		grads[k] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), shapes[k]...), F32: r}
	}
	return grads, nil
}

func (v *variadicOp) BackwardNeeds() (in, out []int) {
	if v.kind == varSum || v.kind == varMean {
		return nil, nil
	}
	in = make([]int, 64) // every input; indices beyond the node's count are ignored
	for i := range in {
		in[i] = i
	}
	return in, nil
}

// ---------------------------------------------------------------------------
// Comparisons and logic (boolean outputs, not differentiable).

type cmpKind uint8

const (
	cmpGreater cmpKind = iota
	cmpLess
	cmpGreaterEq
	cmpLessEq
	cmpAnd
	cmpOr
	cmpXor
)

var cmpNames = [...]string{"Greater", "Less", "GreaterOrEqual", "LessOrEqual", "And", "Or", "Xor"}

type compareOp struct{ kind cmpKind }

func buildCompare(k cmpKind) Builder {
	return func(n *onnx.Node, env *Env) (Op, error) { return &compareOp{kind: k}, nil }
}

func (c *compareOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	name := cmpNames[c.kind]
	if err := shNeed(in, 2, name); err != nil {
		return nil, err
	}
	x, y := in[0], in[1]
	if (x.DType == tensor.Float32) != (y.DType == tensor.Float32) {
		return nil, fmt.Errorf("%s: mismatched types %s and %s", name, x, y)
	}
	if c.kind >= cmpAnd && (x.DType != tensor.Bool || y.DType != tensor.Bool) {
		return nil, fmt.Errorf("%s: needs boolean inputs, got %s and %s", name, x, y)
	}
	shape, err := broadcastShapes(x.Shape, y.Shape)
	if err != nil {
		return nil, fmt.Errorf("%s: %v", name, err)
	}
	p, err := newBcastPlan(shape, x.Shape, y.Shape)
	if err != nil {
		return nil, err
	}
	out := &tensor.Tensor{DType: tensor.Bool, Shape: shape, I64: make([]int64, tensor.Numel(shape))}
	isF := x.DType == tensor.Float32
	p.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			var a, b float64
			var ai, bi int64
			if isF {
				a, b = float64(x.F32[offs[0]+i*steps[0]]), float64(y.F32[offs[1]+i*steps[1]])
			} else {
				ai, bi = x.I64[offs[0]+i*steps[0]], y.I64[offs[1]+i*steps[1]]
			}
			var r bool
			switch c.kind {
			case cmpGreater:
				r = isF && a > b || !isF && ai > bi
			case cmpLess:
				r = isF && a < b || !isF && ai < bi
			case cmpGreaterEq:
				r = isF && a >= b || !isF && ai >= bi
			case cmpLessEq:
				r = isF && a <= b || !isF && ai <= bi
			case cmpAnd:
				r = ai != 0 && bi != 0
			case cmpOr:
				r = ai != 0 || bi != 0
			case cmpXor:
				r = (ai != 0) != (bi != 0)
			}
			if r {
				out.I64[o+i] = 1
			}
		}
	})
	return []*tensor.Tensor{out}, nil
}

type notOp struct{}

func buildNot(n *onnx.Node, env *Env) (Op, error) { return notOp{}, nil }

func (notOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "Not"); err != nil {
		return nil, err
	}
	if in[0].DType != tensor.Bool {
		return nil, fmt.Errorf("Not: needs a boolean input, got %s", in[0])
	}
	y := &tensor.Tensor{DType: tensor.Bool, Shape: append([]int(nil), in[0].Shape...), I64: make([]int64, in[0].Len())}
	for i, v := range in[0].I64 {
		if v == 0 {
			y.I64[i] = 1
		}
	}
	return []*tensor.Tensor{y}, nil
}

// ---------------------------------------------------------------------------
// Mod

// modOp: with fmod=1 the result takes the dividend's sign (C fmod); with
// fmod=0 (integers only) the divisor's sign (Python %).
type modOp struct{ fmod bool }

func buildMod(n *onnx.Node, env *Env) (Op, error) {
	return &modOp{fmod: n.Int("fmod", 0) != 0}, nil
}

func (m *modOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 2, "Mod"); err != nil {
		return nil, err
	}
	x, y := in[0], in[1]
	if (x.DType == tensor.Float32) != (y.DType == tensor.Float32) {
		return nil, fmt.Errorf("Mod: mismatched types %s and %s", x, y)
	}
	if x.DType == tensor.Float32 && !m.fmod {
		return nil, fmt.Errorf("Mod: float inputs need fmod=1")
	}
	shape, err := broadcastShapes(x.Shape, y.Shape)
	if err != nil {
		return nil, fmt.Errorf("Mod: %v", err)
	}
	p, err := newBcastPlan(shape, x.Shape, y.Shape)
	if err != nil {
		return nil, err
	}
	if x.DType == tensor.Float32 {
		out := tensor.New(shape...)
		p.rows(func(o int, offs, steps []int, n int) {
			for i := 0; i < n; i++ {
				out.F32[o+i] = float32(math.Mod(float64(x.F32[offs[0]+i*steps[0]]), float64(y.F32[offs[1]+i*steps[1]])))
			}
		})
		return []*tensor.Tensor{out}, nil
	}
	out := tensor.NewInt64(shape...)
	var zero bool
	p.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			a, b := x.I64[offs[0]+i*steps[0]], y.I64[offs[1]+i*steps[1]]
			if b == 0 {
				zero = true
				continue
			}
			r := a % b
			if !m.fmod && r != 0 && (r < 0) != (b < 0) {
				r += b
			}
			out.I64[o+i] = r
		}
	})
	if zero {
		return nil, fmt.Errorf("Mod: integer division by zero")
	}
	return []*tensor.Tensor{out}, nil
}

// ---------------------------------------------------------------------------
// IsNaN, IsInf

type floatTestOp struct {
	name string
	test func(float64) bool
}

func buildIsNaN(n *onnx.Node, env *Env) (Op, error) {
	return &floatTestOp{name: "IsNaN", test: math.IsNaN}, nil
}

func buildIsInf(n *onnx.Node, env *Env) (Op, error) {
	neg, pos := n.Int("detect_negative", 1) != 0, n.Int("detect_positive", 1) != 0
	return &floatTestOp{name: "IsInf", test: func(v float64) bool {
		return neg && math.IsInf(v, -1) || pos && math.IsInf(v, 1)
	}}, nil
}

func (f *floatTestOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, f.name); err != nil {
		return nil, err
	}
	x := in[0]
	y := &tensor.Tensor{DType: tensor.Bool, Shape: append([]int(nil), x.Shape...), I64: make([]int64, x.Len())}
	if x.DType == tensor.Float32 {
		for i, v := range x.F32 {
			if f.test(float64(v)) {
				y.I64[i] = 1
			}
		}
	}
	return []*tensor.Tensor{y}, nil
}
