package engine

// Elementwise operators: activations, arithmetic with numpy broadcasting,
// comparison, selection and casts.
//
// Float arithmetic is done in float32 like the ONNX reference backends, with
// transcendental functions evaluated in float64 and rounded once. Integer
// tensors (every ONNX integer type is decoded into int64) use int64
// arithmetic, which is what shape subgraphs (Shape → Gather → Mul → Concat)
// need; narrower integer types are not wrapped to their width, a stated
// limitation that only matters on overflow.

import (
	"fmt"
	"math"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("Relu", buildRelu)
	register("LeakyRelu", buildLeakyRelu)
	register("Sigmoid", buildSigmoid)
	register("Tanh", buildTanh)
	register("HardSigmoid", buildHardSigmoid)
	register("HardSwish", buildHardSwish)
	register("Erf", buildErf)
	register("Exp", buildExp)
	register("Sqrt", buildSqrt)
	register("Clip", buildClip)
	register("PRelu", buildPRelu)
	register("Add", buildBinary(binAdd))
	register("Sub", buildBinary(binSub))
	register("Mul", buildBinary(binMul))
	register("Div", buildBinary(binDiv))
	register("Pow", buildBinary(binPow))
	register("Equal", buildEqual)
	register("Where", buildWhere)
	register("Cast", buildCast)
}

// ---------------------------------------------------------------------------
// Unary float functions.

// unaryOp applies f elementwise. df gives dy/dx from the input x and the
// output y, so each op can use whichever is cheaper; useIn/useOut record
// which of them Backward reads.
type unaryOp struct {
	name          string
	f             func(x float32) float32
	df            func(x, y float32) float32
	i64           func(x int64) int64 // integer version, nil when float only
	useIn, useOut bool
	// vec, when set, is a whole-slice forward kernel for hot activations,
	// avoiding an indirect call per element.
	vec   func(dst, src []float32)
	arena *arena // float32 output buffers; nil allocates
	team  *team  // splits the gradient masks; nil starts fresh goroutines
}

func (u *unaryOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if len(in) < 1 || in[0] == nil {
		return nil, fmt.Errorf("%s: missing input", u.name)
	}
	x := in[0]
	switch {
	case x.DType == tensor.Float32:
		y := u.arena.tensor(x.Shape...)
		if u.vec != nil {
			u.vec(y.F32, x.F32)
			return []*tensor.Tensor{y}, nil
		}
		for i, v := range x.F32 {
			y.F32[i] = u.f(v)
		}
		return []*tensor.Tensor{y}, nil
	case x.DType == tensor.Int64 && u.i64 != nil:
		y := tensor.NewInt64(x.Shape...)
		for i, v := range x.I64 {
			y.I64[i] = u.i64(v)
		}
		return []*tensor.Tensor{y}, nil
	}
	return nil, fmt.Errorf("%s: unsupported input type %s", u.name, x)
}

func (u *unaryOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	g := gradOut[0]
	if g == nil || in[0].DType != tensor.Float32 {
		return []*tensor.Tensor{nil}, nil
	}
	gx := u.arena.tensor(in[0].Shape...) // every element written below
	if u.name == "Relu" {
		// The hot activation of most CNNs: the same rule as its df
		// (gradient where y > 0) without an indirect call per element.
		reluMask(u.team, gx.F32, g.F32, out[0].F32)
		return []*tensor.Tensor{gx}, nil
	}
	u.grad(gx.F32, g.F32, in[0], out[0])
	return []*tensor.Tensor{gx}, nil
}

// backwardInPlace implements gradInPlace: dX = dY ⊙ f′ overwrites dY.
func (u *unaryOp) backwardInPlace(in, out []*tensor.Tensor, g *tensor.Tensor) ([]*tensor.Tensor, error) {
	if in[0].DType != tensor.Float32 || !shapeEq(g.Shape, in[0].Shape) {
		return nil, nil
	}
	if u.name == "Relu" {
		reluMask(u.team, g.F32, g.F32, out[0].F32)
	} else {
		u.grad(g.F32, g.F32, in[0], out[0])
	}
	return []*tensor.Tensor{g}, nil
}

// grad writes dst[i] = g[i]·f′(x[i], y[i]); dst may be g.
func (u *unaryOp) grad(dst, g []float32, x, y *tensor.Tensor) {
	var xs, ys []float32
	if u.useIn {
		xs = x.F32
	}
	if u.useOut {
		ys = y.F32
	}
	dst = dst[:len(g)]
	for i, gv := range g {
		var x, y float32
		if xs != nil {
			x = xs[i]
		}
		if ys != nil {
			y = ys[i]
		}
		dst[i] = gv * u.df(x, y)
	}
}

// reluMask writes dst[i] = g[i] where y[i] > 0 and 0 elsewhere; dst may be
// g. ReLU's output is positive exactly where its input is (max(x, 0) > 0
// iff x > 0, and a NaN input gives a NaN output, positive in neither), so
// reading y gives the input-based rule's bits and lets a Conv→Relu pair
// fuse in backward runs too: the pre-activation is then never kept. Long
// slices are split over the cores.
func reluMask(tm *team, dst, g, y []float32) {
	maskBits(tm, dst, g, y, reluLo, reluSpan)
}

// reluLo and reluSpan are ReLU's gradient test as maskBits takes it: y > 0
// iff its bits, less one, lie below +Inf's (0 and negatives wrap around,
// NaNs lie above).
const reluLo, reluSpan = 1, 0x7f800000

// clipRange returns Clip's gradient test lo < y < hi as maskBits takes it
// (bits(y) − lo′ < span′, unsigned), compared in float32 as Forward
// clamps; ok is false when a bound is negative or the interval empty,
// where no such test exists.
func clipRange(lo, hi float64) (lo2, span uint32, ok bool) {
	l, h := float32(lo), float32(hi)
	if l == 0 {
		l = 0 // −0 as +0: y > −0 iff y > +0
	}
	lb, hb := math.Float32bits(l), math.Float32bits(h)
	if lb>>31 != 0 || hb>>31 != 0 || !(h > l) {
		return 0, 0, false
	}
	return lb + 1, hb - lb - 1, true
}

// maskBits writes dst[i] = g[i] where bits(y[i]) − lo < span (unsigned)
// and +0 elsewhere; dst may be g. For non-negative bounds l < h this is
// l < y < h (float32 order matches the bits' unsigned order there; NaNs
// and negatives fall outside). kernel.MaskRange does it with a vector
// compare and a masked move (the conditional-move Go loop before it was
// 12 % of a MobileNetV2 forward+backward pass at batch 1). Long slices
// are split over the team's cores (nil: fresh goroutines).
func maskBits(tm *team, dst, g, y []float32, lo, span uint32) {
	n := len(y)
	tm.split(n, n, func(i0, i1 int) {
		kernel.MaskRange(dst[i0:i1], g[i0:i1], y[i0:i1], lo, span)
	})
}

func (u *unaryOp) BackwardNeeds() (in, out []int) {
	if u.useIn {
		in = []int{0}
	}
	if u.useOut {
		out = []int{0}
	}
	return in, out
}

func buildRelu(n *onnx.Node, env *Env) (Op, error) {
	return &unaryOp{name: "Relu", team: env.team,
		f: func(x float32) float32 {
			if x > 0 {
				return x
			}
			return 0
		},
		df: func(_, y float32) float32 {
			if y > 0 { // y > 0 iff x > 0, see reluMask
				return 1
			}
			return 0
		},
		i64: func(x int64) int64 {
			if x > 0 {
				return x
			}
			return 0
		},
		vec: func(dst, src []float32) {
			dst = dst[:len(src)]
			for i, v := range src {
				dst[i] = max(v, 0)
			}
		},
		useOut: true}, nil
}

func buildLeakyRelu(n *onnx.Node, env *Env) (Op, error) {
	alpha := n.Float("alpha", 0.01)
	return &unaryOp{name: "LeakyRelu",
		f: func(x float32) float32 {
			if x >= 0 {
				return x
			}
			return alpha * x
		},
		df: func(x, _ float32) float32 {
			if x >= 0 {
				return 1
			}
			return alpha
		},
		useIn: true}, nil
}

func buildSigmoid(n *onnx.Node, env *Env) (Op, error) {
	return &unaryOp{name: "Sigmoid",
		f:      func(x float32) float32 { return float32(1 / (1 + math.Exp(-float64(x)))) },
		df:     func(_, y float32) float32 { return y * (1 - y) },
		useOut: true}, nil
}

func buildTanh(n *onnx.Node, env *Env) (Op, error) {
	return &unaryOp{name: "Tanh",
		f:      func(x float32) float32 { return float32(math.Tanh(float64(x))) },
		df:     func(_, y float32) float32 { return 1 - y*y },
		useOut: true}, nil
}

func buildHardSigmoid(n *onnx.Node, env *Env) (Op, error) {
	alpha, beta := n.Float("alpha", 0.2), n.Float("beta", 0.5)
	return &unaryOp{name: "HardSigmoid",
		f: func(x float32) float32 { return min(1, max(0, alpha*x+beta)) },
		df: func(x, _ float32) float32 {
			if v := alpha*x + beta; v > 0 && v < 1 {
				return alpha
			}
			return 0
		},
		useIn: true}, nil
}

// HardSwish is x·HardSigmoid(x) with alpha 1/6 and beta 1/2 (ONNX opset 14).
func buildHardSwish(n *onnx.Node, env *Env) (Op, error) {
	return &unaryOp{name: "HardSwish",
		f: func(x float32) float32 { return x * min(1, max(0, x/6+0.5)) },
		df: func(x, _ float32) float32 {
			switch {
			case x <= -3:
				return 0
			case x >= 3:
				return 1
			}
			return (2*x + 3) / 6
		},
		useIn: true}, nil
}

func buildErf(n *onnx.Node, env *Env) (Op, error) {
	return &unaryOp{name: "Erf",
		f: func(x float32) float32 { return float32(math.Erf(float64(x))) },
		df: func(x, _ float32) float32 {
			return float32(2 / math.SqrtPi * math.Exp(-float64(x)*float64(x)))
		},
		useIn: true}, nil
}

func buildExp(n *onnx.Node, env *Env) (Op, error) {
	return &unaryOp{name: "Exp",
		f:      func(x float32) float32 { return float32(math.Exp(float64(x))) },
		df:     func(_, y float32) float32 { return y },
		useOut: true}, nil
}

func buildSqrt(n *onnx.Node, env *Env) (Op, error) {
	return &unaryOp{name: "Sqrt",
		f:      func(x float32) float32 { return float32(math.Sqrt(float64(x))) },
		df:     func(_, y float32) float32 { return 0.5 / y },
		useOut: true}, nil
}

// ---------------------------------------------------------------------------
// Clip

// clipOp bounds x to [lo, hi]. Before opset 11 the bounds are attributes;
// from 11 on they are optional scalar inputs 1 and 2.
type clipOp struct {
	attrBounds bool
	lo, hi     float32
	arena      *arena // gradient buffers; nil allocates
	team       *team  // splits the gradient masks; nil starts fresh goroutines
}

func buildClip(n *onnx.Node, env *Env) (Op, error) {
	if env.Opset < 11 {
		// Opset 6 defaults are ±FLT_MAX, which behaves like ±Inf here.
		return &clipOp{attrBounds: true, team: env.team,
			lo: n.Float("min", float32(math.Inf(-1))), hi: n.Float("max", float32(math.Inf(1)))}, nil
	}
	return &clipOp{team: env.team}, nil
}

// bounds reads the bound inputs; absent bounds are infinite.
func (c *clipOp) bounds(in []*tensor.Tensor) (lo, hi float64, err error) {
	if c.attrBounds {
		return float64(c.lo), float64(c.hi), nil
	}
	lo, hi = math.Inf(-1), math.Inf(1)
	for i, dst := range []*float64{&lo, &hi} {
		if len(in) <= i+1 || in[i+1] == nil {
			continue
		}
		b := in[i+1]
		if b.Len() != 1 {
			return 0, 0, fmt.Errorf("Clip: bound %d must be a scalar, got %s", i+1, b)
		}
		if b.DType == tensor.Float32 {
			*dst = float64(b.F32[0])
		} else {
			*dst = float64(b.I64[0])
		}
	}
	return lo, hi, nil
}

func (c *clipOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if len(in) < 1 || in[0] == nil {
		return nil, fmt.Errorf("Clip: missing input")
	}
	lo, hi, err := c.bounds(in)
	if err != nil {
		return nil, err
	}
	x := in[0]
	switch x.DType {
	case tensor.Float32:
		y := tensor.New(x.Shape...)
		l, h := float32(lo), float32(hi)
		for i, v := range x.F32 {
			y.F32[i] = min(h, max(l, v))
		}
		return []*tensor.Tensor{y}, nil
	case tensor.Int64:
		y := tensor.NewInt64(x.Shape...)
		for i, v := range x.I64 {
			f := float64(v)
			switch {
			case f < lo:
				v = int64(lo)
			case f > hi:
				v = int64(hi)
			}
			y.I64[i] = v
		}
		return []*tensor.Tensor{y}, nil
	}
	return nil, fmt.Errorf("Clip: unsupported input type %s", x)
}

// BackwardNeeds: the mask is read from the output (and the bounds), so a
// Conv→Clip pair fuses in backward runs as in forward-only ones.
func (c *clipOp) BackwardNeeds() (in, out []int) { return []int{1, 2}, []int{0} }

// Backward passes the gradient where lo < x < hi: at a bound the clip is
// not differentiable and, as in most frameworks' subgradient choice for
// saturating units, nothing flows. It tests the output y = min(hi,
// max(lo, x)), which lies strictly inside the bounds exactly where x does
// (and is NaN where x is), so the mask is the input rule's.
func (c *clipOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads, g := floatBackward(in, gradOut)
	if g == nil {
		return grads, nil
	}
	lo, hi, err := c.bounds(in)
	if err != nil {
		return nil, err
	}
	gx := c.arena.tensor(in[0].Shape...) // every element written
	clipMask(c.team, gx.F32, g.F32, out[0].F32, lo, hi)
	grads[0] = gx
	return grads, nil
}

// backwardInPlace implements gradInPlace.
func (c *clipOp) backwardInPlace(in, out []*tensor.Tensor, g *tensor.Tensor) ([]*tensor.Tensor, error) {
	if in[0].DType != tensor.Float32 || !shapeEq(g.Shape, in[0].Shape) {
		return nil, nil
	}
	lo, hi, err := c.bounds(in)
	if err != nil {
		return nil, err
	}
	clipMask(c.team, g.F32, g.F32, out[0].F32, lo, hi)
	grads := make([]*tensor.Tensor, len(in))
	grads[0] = g
	return grads, nil
}

// clipMask writes dst[i] = g[i] where lo < y[i] < hi and 0 elsewhere; dst
// may be g. The bounds are compared as float32, the values Forward clamps
// to, over equal-length slices the compiler keeps free of bounds checks.
// Long slices are split over the cores.
func clipMask(tm *team, dst, g, y []float32, lo, hi float64) {
	if r0, span, ok := clipRange(lo, hi); ok {
		// Non-negative bounds (ReLU6 and most clips): one unsigned range
		// test on the bits.
		maskBits(tm, dst, g, y, r0, span)
		return
	}
	l, h := float32(lo), float32(hi)
	n := len(y)
	tm.split(n, n, func(i0, i1 int) {
		ys, gs, ds := y[i0:i1], g[i0:i1], dst[i0:i1]
		gs, ds = gs[:len(ys)], ds[:len(ys)]
		for i, v := range ys {
			// Branch-free, as in maskBits: two conditional moves.
			var a, b uint32
			if v > l {
				a = ^uint32(0)
			}
			if v < h {
				b = ^uint32(0)
			}
			ds[i] = math.Float32frombits(math.Float32bits(gs[i]) & a & b)
		}
	})
}

// ---------------------------------------------------------------------------
// Binary arithmetic with broadcasting.

type binKind uint8

const (
	binAdd binKind = iota
	binSub
	binMul
	binDiv
	binPow
)

var binNames = [...]string{"Add", "Sub", "Mul", "Div", "Pow"}

// binaryOp is Add, Sub, Mul, Div or Pow. legacy selects the opset 1–6
// broadcast (broadcast=1 with axis): B's dims line up with A's starting at
// legacyAxis instead of at the right.
type binaryOp struct {
	kind       binKind
	legacy     bool
	legacyAxis int64
	arena      *arena // float32 output buffers; nil allocates
}

func buildBinary(k binKind) Builder {
	return func(n *onnx.Node, env *Env) (Op, error) {
		b := &binaryOp{kind: k}
		if env.Opset < 7 && n.Int("broadcast", 0) != 0 && n.Has("axis") {
			b.legacy, b.legacyAxis = true, n.Int("axis", 0)
		}
		return b, nil
	}
}

// yShape is the shape y takes part in broadcasting with: its own, or under
// legacy broadcasting, padded with 1s so that it starts at legacyAxis of x.
func (b *binaryOp) yShape(x, y *tensor.Tensor) ([]int, error) {
	if !b.legacy {
		return y.Shape, nil
	}
	ax := b.legacyAxis
	if ax < 0 || int(ax)+len(y.Shape) > len(x.Shape) {
		return nil, fmt.Errorf("%s: legacy broadcast of %s at axis %d of %s", binNames[b.kind], y, ax, x)
	}
	s := make([]int, len(x.Shape))
	for i := range s {
		s[i] = 1
	}
	copy(s[ax:], y.Shape)
	return s, nil
}

func (b *binaryOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	name := binNames[b.kind]
	if len(in) < 2 || in[0] == nil || in[1] == nil {
		return nil, fmt.Errorf("%s: needs two inputs", name)
	}
	x, y := in[0], in[1]
	ys, err := b.yShape(x, y)
	if err != nil {
		return nil, err
	}
	shape, err := broadcastShapes(x.Shape, ys)
	if err != nil {
		return nil, fmt.Errorf("%s: %v", name, err)
	}
	p, err := newBcastPlan(shape, x.Shape, ys)
	if err != nil {
		return nil, fmt.Errorf("%s: %v", name, err)
	}
	xf, yf := x.DType == tensor.Float32, y.DType == tensor.Float32
	switch {
	case xf && yf:
		return []*tensor.Tensor{b.floatForward(p, shape, x.F32, y.F32)}, nil
	case !xf && !yf && x.DType == tensor.Int64 && y.DType == tensor.Int64:
		out, err := b.intForward(p, shape, x.I64, y.I64)
		if err != nil {
			return nil, err
		}
		return []*tensor.Tensor{out}, nil
	case b.kind == binPow && xf:
		// Pow allows an integer exponent with a float base.
		e := make([]float32, len(y.I64))
		for i, v := range y.I64 {
			e[i] = float32(v)
		}
		return []*tensor.Tensor{b.floatForward(p, shape, x.F32, e)}, nil
	case b.kind == binPow && x.DType == tensor.Int64:
		// Integer base, float exponent: computed in float64 and truncated,
		// the output keeping the base's type.
		out := tensor.NewInt64(shape...)
		p.rows(func(o int, offs, steps []int, n int) {
			for i := 0; i < n; i++ {
				out.I64[o+i] = int64(math.Pow(float64(x.I64[offs[0]+i*steps[0]]), float64(y.F32[offs[1]+i*steps[1]])))
			}
		})
		return []*tensor.Tensor{out}, nil
	}
	return nil, fmt.Errorf("%s: unsupported operand types %s and %s", name, x, y)
}

func (b *binaryOp) floatForward(p *bcastPlan, shape []int, x, y []float32) *tensor.Tensor {
	out := b.arena.tensor(shape...)
	dst := out.F32
	kind := b.kind
	p.rows(func(o int, offs, steps []int, n int) {
		ia, sa, ib, sb := offs[0], steps[0], offs[1], steps[1]
		d := dst[o : o+n]
		switch kind {
		case binAdd:
			for i := range d {
				d[i] = x[ia+i*sa] + y[ib+i*sb]
			}
		case binSub:
			for i := range d {
				d[i] = x[ia+i*sa] - y[ib+i*sb]
			}
		case binMul:
			for i := range d {
				d[i] = x[ia+i*sa] * y[ib+i*sb]
			}
		case binDiv:
			for i := range d {
				d[i] = x[ia+i*sa] / y[ib+i*sb]
			}
		case binPow:
			for i := range d {
				d[i] = powF32(x[ia+i*sa], y[ib+i*sb])
			}
		}
	})
	return out
}

// powF32 is float32 pow with the common small exponents done exactly.
func powF32(a, b float32) float32 {
	switch b {
	case 1:
		return a
	case 2:
		return a * a
	case 0.5:
		return float32(math.Sqrt(float64(a)))
	}
	return float32(math.Pow(float64(a), float64(b)))
}

func (b *binaryOp) intForward(p *bcastPlan, shape []int, x, y []int64) (*tensor.Tensor, error) {
	out := tensor.NewInt64(shape...)
	dst := out.I64
	var divZero bool
	p.rows(func(o int, offs, steps []int, n int) {
		ia, sa, ib, sb := offs[0], steps[0], offs[1], steps[1]
		for i := 0; i < n; i++ {
			a, c := x[ia+i*sa], y[ib+i*sb]
			var v int64
			switch b.kind {
			case binAdd:
				v = a + c
			case binSub:
				v = a - c
			case binMul:
				v = a * c
			case binDiv:
				if c == 0 {
					divZero = true
					continue
				}
				v = a / c // truncation toward zero, as C and the reference runtimes do
			case binPow:
				v = int64(math.Pow(float64(a), float64(c)))
			}
			dst[o+i] = v
		}
	})
	if divZero {
		return nil, fmt.Errorf("Div: integer division by zero")
	}
	return out, nil
}

// Backward reduces each operand's gradient back over its broadcast
// dimensions.
func (b *binaryOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return b.BackwardFor(in, out, gradOut, []bool{true, true})
}

// BackwardNeedsFor implements SelectiveBackward: with a constant operand
// (a scale, a bias) only the other operand's gradient is formed, and only
// the forward values it reads are kept.
func (b *binaryOp) BackwardNeedsFor(need []bool) (in, out []int) {
	nx, ny := len(need) > 0 && need[0], len(need) > 1 && need[1]
	switch b.kind {
	case binAdd, binSub:
		return nil, nil
	case binMul:
		if nx {
			in = append(in, 1)
		}
		if ny {
			in = append(in, 0)
		}
		return in, nil
	case binDiv:
		if ny {
			return []int{0, 1}, nil
		}
		return []int{1}, nil
	}
	return []int{0, 1}, nil
}

// BackwardFor implements SelectiveBackward.
func (b *binaryOp) BackwardFor(in, out, gradOut []*tensor.Tensor, need []bool) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, 2)
	g := gradOut[0]
	if g == nil || in[0].DType != tensor.Float32 {
		return grads, nil
	}
	x, y := in[0], in[1]
	needX, needY := len(need) > 0 && need[0], len(need) > 1 && need[1]
	yFloat := y.DType == tensor.Float32 && needY
	shape := g.Shape
	ys, err := b.yShape(x, y)
	if err != nil {
		return nil, err
	}
	var gx, gy []float32 // full-size gradients before reduction
	switch b.kind {
	case binAdd, binSub:
		if needX {
			gx = g.F32
		}
		if yFloat {
			if b.kind == binAdd {
				gy = g.F32
			} else {
				gy = b.arena.floats(len(g.F32)) // every element written below
				for i, v := range g.F32 {
					gy[i] = -v
				}
			}
		}
	default:
		p, err := newBcastPlan(shape, x.Shape, ys)
		if err != nil {
			return nil, err
		}
		yv := y.F32
		if y.DType != tensor.Float32 { // integer exponent of Pow
			yv = make([]float32, len(y.I64))
			for i, v := range y.I64 {
				yv[i] = float32(v)
			}
		}
		// Every element is written below.
		if needX {
			gx = b.arena.floats(len(g.F32))
		}
		if yFloat {
			gy = b.arena.floats(len(g.F32))
		}
		xv, gv, kind := x.F32, g.F32, b.kind
		if kind == binMul {
			// The common case (scaling, gating) without float64 round trips.
			p.rows(func(o int, offs, steps []int, n int) {
				ia, sa, ib, sb := offs[0], steps[0], offs[1], steps[1]
				for i, gr := range gv[o : o+n] {
					if gx != nil {
						gx[o+i] = gr * yv[ib+i*sb]
					}
					if gy != nil {
						gy[o+i] = gr * xv[ia+i*sa]
					}
				}
			})
			break
		}
		p.rows(func(o int, offs, steps []int, n int) {
			for i := 0; i < n; i++ {
				c, gr := float64(yv[offs[1]+i*steps[1]]), float64(gv[o+i])
				var a float64
				if xv != nil { // Div's dx does not read x, which may not be kept
					a = float64(xv[offs[0]+i*steps[0]])
				}
				var da, dc float64
				switch kind {
				case binMul:
					da, dc = gr*c, gr*a
				case binDiv:
					da, dc = gr/c, -gr*a/(c*c)
				case binPow:
					da = gr * c * math.Pow(a, c-1)
					if a > 0 {
						dc = gr * math.Pow(a, c) * math.Log(a)
					}
				}
				if gx != nil {
					gx[o+i] = float32(da)
				}
				if gy != nil {
					gy[o+i] = float32(dc)
				}
			}
		})
	}
	if gx != nil {
		rx, err := reduceToShape(gx, shape, x.Shape)
		if err != nil {
			return nil, err
		}
		b.recycleFull(gx, rx, g.F32)
		grads[0] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), x.Shape...), F32: rx}
	}
	if gy != nil {
		ry, err := reduceToShape(gy, shape, ys)
		if err != nil {
			return nil, err
		}
		b.recycleFull(gy, ry, g.F32)
		grads[1] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), y.Shape...), F32: ry}
	}
	// Where no reduction was needed, Add passes g itself on (and Sub for
	// x): a view of the output gradient, which Pass.Backward shares
	// copy-on-write instead of copying here.
	return grads, nil
}

func (b *binaryOp) BackwardNeeds() (in, out []int) {
	return b.BackwardNeedsFor([]bool{true, true})
}

// ownCopy returns s, or a copy of it when it aliases shared (the incoming
// gradient), so returned gradients never share storage with gradOut.
func ownCopy(s, shared []float32) []float32 {
	if len(s) > 0 && len(shared) > 0 && &s[0] == &shared[0] {
		return append([]float32(nil), s...)
	}
	return s
}

// ---------------------------------------------------------------------------
// PRelu

// preluOp computes x<0 ? slope·x : x with slope broadcast to x
// (unidirectionally, opset 7+). Opset 6 exports carry a per-channel slope
// of shape [C]; it is applied along axis 1, as those models intend.
type preluOp struct{ legacy bool }

func buildPRelu(n *onnx.Node, env *Env) (Op, error) {
	return &preluOp{legacy: env.Opset < 7}, nil
}

// slopeShape returns the shape slope is broadcast from.
func (p *preluOp) slopeShape(x, s *tensor.Tensor) ([]int, error) {
	shape := s.Shape
	if p.legacy && len(shape) == 1 && len(x.Shape) >= 2 && shape[0] == x.Shape[1] && shape[0] != 1 {
		shape = make([]int, len(x.Shape)-1)
		for i := range shape {
			shape[i] = 1
		}
		shape[0] = s.Shape[0]
	}
	b, err := broadcastShapes(x.Shape, shape)
	if err != nil || !shapeEq(b, x.Shape) {
		return nil, fmt.Errorf("PRelu: slope %s does not broadcast to input %s", s, x)
	}
	return shape, nil
}

func (p *preluOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if len(in) < 2 || in[0] == nil || in[1] == nil {
		return nil, fmt.Errorf("PRelu: needs two inputs")
	}
	x, s := in[0], in[1]
	if x.DType != tensor.Float32 || s.DType != tensor.Float32 {
		return nil, fmt.Errorf("PRelu: unsupported types %s, %s", x, s)
	}
	ss, err := p.slopeShape(x, s)
	if err != nil {
		return nil, err
	}
	plan, err := newBcastPlan(x.Shape, x.Shape, ss)
	if err != nil {
		return nil, err
	}
	y := tensor.New(x.Shape...)
	plan.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			v := x.F32[o+i]
			if v < 0 {
				v *= s.F32[offs[1]+i*steps[1]]
			}
			y.F32[o+i] = v
		}
	})
	return []*tensor.Tensor{y}, nil
}

func (p *preluOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return p.BackwardFor(in, out, gradOut, []bool{true, true})
}

// BackwardNeedsFor implements SelectiveBackward; the slope gradient is
// skipped when the slope is a trained constant.
func (p *preluOp) BackwardNeedsFor(need []bool) (in, out []int) { return []int{0, 1}, nil }

// BackwardFor implements SelectiveBackward.
func (p *preluOp) BackwardFor(in, out, gradOut []*tensor.Tensor, need []bool) ([]*tensor.Tensor, error) {
	g := gradOut[0]
	if g == nil {
		return make([]*tensor.Tensor, 2), nil
	}
	needSlope := len(need) > 1 && need[1]
	x, s := in[0], in[1]
	ss, err := p.slopeShape(x, s)
	if err != nil {
		return nil, err
	}
	plan, err := newBcastPlan(x.Shape, x.Shape, ss)
	if err != nil {
		return nil, err
	}
	gx := tensor.New(x.Shape...)
	var gsFull []float32
	if needSlope {
		gsFull = make([]float32, len(x.F32))
	}
	plan.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			v, gv := x.F32[o+i], g.F32[o+i]
			if v < 0 {
				gx.F32[o+i] = gv * s.F32[offs[1]+i*steps[1]]
				if gsFull != nil {
					gsFull[o+i] = gv * v
				}
			} else {
				gx.F32[o+i] = gv
			}
		}
	})
	grads := []*tensor.Tensor{gx, nil}
	if len(need) > 0 && !need[0] {
		grads[0] = nil
	}
	if needSlope {
		gs, err := reduceToShape(gsFull, x.Shape, ss)
		if err != nil {
			return nil, err
		}
		grads[1] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), s.Shape...), F32: gs}
	}
	return grads, nil
}

// ---------------------------------------------------------------------------
// Equal, Where

type equalOp struct{}

func buildEqual(n *onnx.Node, env *Env) (Op, error) { return equalOp{}, nil }

func (equalOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if len(in) < 2 || in[0] == nil || in[1] == nil {
		return nil, fmt.Errorf("Equal: needs two inputs")
	}
	x, y := in[0], in[1]
	if (x.DType == tensor.Float32) != (y.DType == tensor.Float32) {
		return nil, fmt.Errorf("Equal: mismatched types %s and %s", x, y)
	}
	shape, err := broadcastShapes(x.Shape, y.Shape)
	if err != nil {
		return nil, fmt.Errorf("Equal: %v", err)
	}
	p, err := newBcastPlan(shape, x.Shape, y.Shape)
	if err != nil {
		return nil, err
	}
	out := &tensor.Tensor{DType: tensor.Bool, Shape: shape, I64: make([]int64, tensor.Numel(shape))}
	p.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			var eq bool
			if x.DType == tensor.Float32 {
				eq = x.F32[offs[0]+i*steps[0]] == y.F32[offs[1]+i*steps[1]]
			} else {
				eq = x.I64[offs[0]+i*steps[0]] == y.I64[offs[1]+i*steps[1]]
			}
			if eq {
				out.I64[o+i] = 1
			}
		}
	})
	return []*tensor.Tensor{out}, nil
}

type whereOp struct{}

func buildWhere(n *onnx.Node, env *Env) (Op, error) { return whereOp{}, nil }

func (whereOp) plan(in []*tensor.Tensor) (*bcastPlan, []int, error) {
	if len(in) < 3 || in[0] == nil || in[1] == nil || in[2] == nil {
		return nil, nil, fmt.Errorf("Where: needs three inputs")
	}
	if in[0].DType == tensor.Float32 {
		return nil, nil, fmt.Errorf("Where: condition must be boolean, got %s", in[0])
	}
	shape, err := broadcastShapes(in[0].Shape, in[1].Shape, in[2].Shape)
	if err != nil {
		return nil, nil, fmt.Errorf("Where: %v", err)
	}
	p, err := newBcastPlan(shape, in[0].Shape, in[1].Shape, in[2].Shape)
	return p, shape, err
}

func (w whereOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	p, shape, err := w.plan(in)
	if err != nil {
		return nil, err
	}
	c, x, y := in[0], in[1], in[2]
	if (x.DType == tensor.Float32) != (y.DType == tensor.Float32) {
		return nil, fmt.Errorf("Where: mismatched types %s and %s", x, y)
	}
	if x.DType == tensor.Float32 {
		out := tensor.New(shape...)
		whereRows(p, c.I64, x.F32, y.F32, out.F32)
		return []*tensor.Tensor{out}, nil
	}
	out := &tensor.Tensor{DType: x.DType, Shape: shape, I64: make([]int64, tensor.Numel(shape))}
	whereRows(p, c.I64, x.I64, y.I64, out.I64)
	return []*tensor.Tensor{out}, nil
}

// whereRows is Where's selection for one element type; p broadcasts
// (cond, x, y) to dst.
func whereRows[T float32 | int64](p *bcastPlan, cond []int64, x, y, dst []T) {
	p.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			if cond[offs[0]+i*steps[0]] != 0 {
				dst[o+i] = x[offs[1]+i*steps[1]]
			} else {
				dst[o+i] = y[offs[2]+i*steps[2]]
			}
		}
	})
}

func (w whereOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, 3)
	g := gradOut[0]
	if g == nil || in[1].DType != tensor.Float32 {
		return grads, nil
	}
	p, shape, err := w.plan(in)
	if err != nil {
		return nil, err
	}
	c := in[0]
	gx, gy := make([]float32, len(g.F32)), make([]float32, len(g.F32))
	p.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			if c.I64[offs[0]+i*steps[0]] != 0 {
				gx[o+i] = g.F32[o+i]
			} else {
				gy[o+i] = g.F32[o+i]
			}
		}
	})
	for k, full := range [][]float32{gx, gy} {
		r, err := reduceToShape(full, shape, in[k+1].Shape)
		if err != nil {
			return nil, err
		}
		grads[k+1] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), in[k+1].Shape...), F32: r}
	}
	return grads, nil
}

func (whereOp) BackwardNeeds() (in, out []int) { return []int{0}, nil }

// ---------------------------------------------------------------------------
// Cast

// ONNX TensorProto.DataType codes.
const (
	onnxFloat    = 1
	onnxUint8    = 2
	onnxInt8     = 3
	onnxUint16   = 4
	onnxInt16    = 5
	onnxInt32    = 6
	onnxInt64    = 7
	onnxString   = 8
	onnxBool     = 9
	onnxFloat16  = 10
	onnxDouble   = 11
	onnxUint32   = 12
	onnxUint64   = 13
	onnxBfloat16 = 16
)

// castOp converts to one of the runtime's three element types. DOUBLE is
// computed as float32 (the runtime has no float64 tensors); FLOAT16,
// BFLOAT16 and STRING are rejected at compile time because rounding to
// them would silently differ from other runtimes.
type castOp struct {
	to tensor.DType
}

func buildCast(n *onnx.Node, env *Env) (Op, error) {
	if !n.Has("to") {
		return nil, fmt.Errorf("Cast: missing attribute to")
	}
	switch to := n.Int("to", 0); to {
	case onnxFloat, onnxDouble:
		return &castOp{to: tensor.Float32}, nil
	case onnxUint8, onnxInt8, onnxUint16, onnxInt16, onnxInt32, onnxInt64, onnxUint32, onnxUint64:
		return &castOp{to: tensor.Int64}, nil
	case onnxBool:
		return &castOp{to: tensor.Bool}, nil
	default:
		return nil, fmt.Errorf("Cast: attribute to=%d names an element type the runtime does not support", to)
	}
}

func (c *castOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if len(in) < 1 || in[0] == nil {
		return nil, fmt.Errorf("Cast: missing input")
	}
	x := in[0]
	out := &tensor.Tensor{DType: c.to, Shape: append([]int(nil), x.Shape...)}
	n := x.Len()
	switch {
	case c.to == tensor.Float32 && x.DType == tensor.Float32:
		out.F32 = append([]float32(nil), x.F32...)
	case c.to == tensor.Float32:
		out.F32 = make([]float32, n)
		for i, v := range x.I64 {
			out.F32[i] = float32(v)
		}
	case x.DType == tensor.Float32:
		out.I64 = make([]int64, n)
		for i, v := range x.F32 {
			if c.to == tensor.Bool {
				if v != 0 {
					out.I64[i] = 1
				}
			} else {
				out.I64[i] = int64(v) // truncation toward zero
			}
		}
	default:
		out.I64 = make([]int64, n)
		for i, v := range x.I64 {
			if c.to == tensor.Bool && v != 0 {
				v = 1
			}
			out.I64[i] = v
		}
	}
	return []*tensor.Tensor{out}, nil
}

// Backward passes the gradient through float-to-float casts only.
func (c *castOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	g := gradOut[0]
	if g == nil || c.to != tensor.Float32 || in[0].DType != tensor.Float32 {
		return []*tensor.Tensor{nil}, nil
	}
	return []*tensor.Tensor{g.Clone()}, nil
}

func (c *castOp) BackwardNeeds() (in, out []int) { return nil, nil }
