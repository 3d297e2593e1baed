package engine

// Shared finite-difference gradient checker for every Differentiable op.
//
// Usage (any op in this package, NN ops included):
//
//	op, _ := buildRelu(node, &Env{Opset: 17})
//	checkGrad(t, op, []*tensor.Tensor{x}, gradOpts{})
//
// What it checks. For the scalar score
//
//	L(x) = Σ_k Σ_i w_k[i] · f_k(x)[i]
//
// over every float output k of the op, with weights w drawn uniformly from
// [-1, 1] (fixed seed, so failures reproduce), Backward(in, out, w) must
// return ∂L/∂x for every float input. Each element x_j of each checked
// input is compared with the central difference
//
//	(L(x + h·e_j) − L(x − h·e_j)) / 2h,   h = gradOpts.Step (default 1e-3),
//
// accumulating L in float64. The forward pass runs in float32, but outputs
// that do not depend on x_j are bit-identical in both evaluations and
// cancel exactly, so the difference carries only the rounding of the few
// outputs x_j touches (~1e-7·|f|/h ≈ 1e-4·|f|) plus truncation error
// O(h²·f'''). Hence the default tolerance
//
//	|analytic − numeric| ≤ Atol + Rtol·|numeric|,  Atol = 1e-3, Rtol = 1e-2,
//
// which is far below the size of any real mistake (a missing broadcast
// reduction or a wrong sign is O(1)). Inputs must keep every element at
// least a few h away from kinks (Relu at 0, Clip bounds, nearest-neighbour
// rounding boundaries); the tests build their inputs that way.
//
// The checker also verifies the contract around Backward: if the op
// implements BackwardNeeder, entries it did not ask for are replaced by
// shape-only tensors (as the runtime does), so a wrong declaration fails
// here; Backward must not modify its arguments; gradients must have their
// input's shape; integer inputs must get a nil gradient. For ops that
// implement SelectiveBackward, BackwardFor asked for one input at a time,
// given only what BackwardNeedsFor declared, must reproduce Backward's
// gradient for that input and return nil for the others.

import (
	"fmt"
	"math"
	"math/rand"
	"testing"

	"heedmap/tensor"
)

// gradOpts tunes checkGrad; the zero value uses the documented defaults.
type gradOpts struct {
	Step       float64 // finite-difference step h (default 1e-3)
	Atol, Rtol float64 // tolerance (defaults 1e-3, 1e-2)
	Wrt        []int   // inputs to check (default: every float input)
	Seed       int64   // seed for the weights w (default 1)
}

// checkGrad fails t if op's Backward disagrees with central differences.
func checkGrad(t *testing.T, op Op, in []*tensor.Tensor, o gradOpts) {
	t.Helper()
	if err := gradCheck(op, in, o); err != nil {
		t.Error(err)
	}
}

// gradCheck is checkGrad returning the first failure as an error, so the
// checker itself can be tested on deliberately wrong ops.
func gradCheck(op Op, in []*tensor.Tensor, o gradOpts) error {
	if o.Step == 0 {
		o.Step = 1e-3
	}
	if o.Atol == 0 {
		o.Atol = 1e-3
	}
	if o.Rtol == 0 {
		o.Rtol = 1e-2
	}
	if o.Seed == 0 {
		o.Seed = 1
	}
	d, ok := op.(Differentiable)
	if !ok {
		return fmt.Errorf("%T does not implement Differentiable", op)
	}
	out, err := op.Forward(in)
	if err != nil {
		return fmt.Errorf("forward: %v", err)
	}
	rng := rand.New(rand.NewSource(o.Seed))
	w := make([]*tensor.Tensor, len(out))
	for k, y := range out {
		if y == nil || y.DType != tensor.Float32 {
			continue
		}
		w[k] = tensor.New(y.Shape...)
		for i := range w[k].F32 {
			w[k].F32[i] = float32(2*rng.Float64() - 1)
		}
	}
	score := func(ins []*tensor.Tensor) (float64, error) {
		ys, err := op.Forward(ins)
		if err != nil {
			return 0, err
		}
		var s float64
		for k, y := range ys {
			if w[k] == nil {
				continue
			}
			for i, v := range y.F32 {
				s += float64(w[k].F32[i]) * float64(v)
			}
		}
		return s, nil
	}

	// Backward with the runtime's view of the forward values.
	bin, bout := make([]*tensor.Tensor, len(in)), make([]*tensor.Tensor, len(out))
	copy(bin, in)
	copy(bout, out)
	if bn, ok := op.(BackwardNeeder); ok {
		needIn, needOut := bn.BackwardNeeds()
		keepIn, keepOut := make([]bool, len(in)), make([]bool, len(out))
		for _, i := range needIn {
			if i >= 0 && i < len(in) {
				keepIn[i] = true
			}
		}
		for _, i := range needOut {
			if i >= 0 && i < len(out) {
				keepOut[i] = true
			}
		}
		for i := range bin {
			if !keepIn[i] {
				bin[i] = shapeOnly(in[i])
			}
		}
		for i := range bout {
			if !keepOut[i] {
				bout[i] = shapeOnly(out[i])
			}
		}
	}
	snapIn, snapOut, snapW := cloneAll(in), cloneAll(out), cloneAll(w)
	grads, err := d.Backward(bin, bout, w)
	if err != nil {
		return fmt.Errorf("backward: %v", err)
	}
	if !equalAll(in, snapIn) || !equalAll(out, snapOut) || !equalAll(w, snapW) {
		return fmt.Errorf("backward modified its arguments")
	}
	if len(grads) != len(in) {
		return fmt.Errorf("backward returned %d gradients for %d inputs", len(grads), len(in))
	}
	wrt := o.Wrt
	if wrt == nil {
		for i, x := range in {
			if x != nil && x.DType == tensor.Float32 {
				wrt = append(wrt, i)
			}
		}
	}
	for i, x := range in {
		if x != nil && x.DType != tensor.Float32 && grads[i] != nil {
			return fmt.Errorf("input %d (%s) is not differentiable but got a gradient", i, x)
		}
	}
	for _, i := range wrt {
		x := in[i]
		g := grads[i]
		if g == nil {
			return fmt.Errorf("input %d: no gradient", i)
		}
		if !shapeEq(g.Shape, x.Shape) || len(g.F32) != len(x.F32) {
			return fmt.Errorf("input %d: gradient %s for input %s", i, g, x)
		}
		pert := cloneAll(in)
		for j := range x.F32 {
			orig := pert[i].F32[j]
			pert[i].F32[j] = orig + float32(o.Step)
			hi := float64(pert[i].F32[j])
			lp, err := score(pert)
			if err != nil {
				return err
			}
			pert[i].F32[j] = orig - float32(o.Step)
			lo := float64(pert[i].F32[j])
			lm, err := score(pert)
			if err != nil {
				return err
			}
			pert[i].F32[j] = orig
			// Divide by the step actually taken after float32 rounding.
			num := (lp - lm) / (hi - lo)
			ana := float64(g.F32[j])
			if !(math.Abs(ana-num) <= o.Atol+o.Rtol*math.Abs(num)) { // NaN on either side fails
				return fmt.Errorf("input %d element %d (x=%g): analytic %.6g, numeric %.6g", i, j, orig, ana, num)
			}
		}
	}
	if sb, ok := op.(SelectiveBackward); ok {
		// Each differentiable input alone: BackwardFor must give the same
		// gradient from only the values BackwardNeedsFor declared, and nil
		// for the inputs not asked for.
		for _, i := range wrt {
			need := make([]bool, len(in))
			need[i] = true
			ni, no := sb.BackwardNeedsFor(need)
			sin, sout := make([]*tensor.Tensor, len(in)), make([]*tensor.Tensor, len(out))
			for k := range in {
				sin[k] = shapeOnly(in[k])
			}
			for k := range out {
				sout[k] = shapeOnly(out[k])
			}
			for _, k := range ni {
				if k >= 0 && k < len(in) {
					sin[k] = in[k]
				}
			}
			for _, k := range no {
				if k >= 0 && k < len(out) {
					sout[k] = out[k]
				}
			}
			sg, err := sb.BackwardFor(sin, sout, w, need)
			if err != nil {
				return fmt.Errorf("BackwardFor input %d only: %v", i, err)
			}
			for k := range sg {
				if k != i && sg[k] != nil {
					return fmt.Errorf("BackwardFor input %d only: got a gradient for input %d", i, k)
				}
			}
			if sg[i] == nil || !equalAll([]*tensor.Tensor{sg[i]}, []*tensor.Tensor{grads[i]}) {
				return fmt.Errorf("BackwardFor input %d only: gradient differs from Backward", i)
			}
		}
	}
	return nil
}

func cloneAll(ts []*tensor.Tensor) []*tensor.Tensor {
	c := make([]*tensor.Tensor, len(ts))
	for i, t := range ts {
		if t != nil {
			c[i] = t.Clone()
		}
	}
	return c
}

func equalAll(a, b []*tensor.Tensor) bool {
	for i := range a {
		if (a[i] == nil) != (b[i] == nil) {
			return false
		}
		if a[i] == nil {
			continue
		}
		if !shapeEq(a[i].Shape, b[i].Shape) || len(a[i].F32) != len(b[i].F32) || len(a[i].I64) != len(b[i].I64) {
			return false
		}
		for j := range a[i].F32 {
			if math.Float32bits(a[i].F32[j]) != math.Float32bits(b[i].F32[j]) {
				return false
			}
		}
		for j := range a[i].I64 {
			if a[i].I64[j] != b[i].I64[j] {
				return false
			}
		}
	}
	return true
}

// randTensor returns a float tensor with elements uniform in [lo, hi).
func randTensor(rng *rand.Rand, lo, hi float64, shape ...int) *tensor.Tensor {
	t := tensor.New(shape...)
	for i := range t.F32 {
		t.F32[i] = float32(lo + (hi-lo)*rng.Float64())
	}
	return t
}

// randAwayFrom returns a float tensor uniform in [lo, hi) whose elements
// all keep at least gap from each of the kinks.
func randAwayFrom(rng *rand.Rand, lo, hi, gap float64, kinks []float64, shape ...int) *tensor.Tensor {
	t := tensor.New(shape...)
	for i := range t.F32 {
	again:
		v := lo + (hi-lo)*rng.Float64()
		for _, k := range kinks {
			if math.Abs(v-k) < gap {
				goto again
			}
		}
		t.F32[i] = float32(v)
	}
	return t
}

// TestGradCheckCatchesWrongGradient makes sure the checker can fail: an op
// whose Backward forgets the broadcast reduction and one with a wrong
// factor must both be rejected.
func TestGradCheckCatchesWrongGradient(t *testing.T) {
	rng := rand.New(rand.NewSource(3))
	x := randTensor(rng, -1, 1, 2, 3)
	good := &unaryOp{name: "square", f: func(x float32) float32 { return x * x },
		df: func(x, _ float32) float32 { return 2 * x }, useIn: true}
	if err := gradCheck(good, []*tensor.Tensor{x}, gradOpts{}); err != nil {
		t.Fatalf("correct gradient rejected: %v", err)
	}
	bad := &unaryOp{name: "square", f: func(x float32) float32 { return x * x },
		df: func(x, _ float32) float32 { return 2.1 * x }, useIn: true}
	if err := gradCheck(bad, []*tensor.Tensor{x}, gradOpts{}); err == nil {
		t.Error("a 5% wrong gradient passed")
	}
	// Declares it needs nothing but reads its input in Backward.
	liar := undeclaredNeeds{good}
	if err := gradCheck(liar, []*tensor.Tensor{x}, gradOpts{}); err == nil {
		t.Error("a Backward reading an undeclared input passed")
	}
	// A broadcast Add whose Backward skipped the reduction.
	a, b := randTensor(rng, -1, 1, 2, 3), randTensor(rng, -1, 1, 3)
	if err := gradCheck(noReduceAdd{}, []*tensor.Tensor{a, b}, gradOpts{}); err == nil {
		t.Error("missing broadcast reduction passed")
	}
}

type noReduceAdd struct{ binaryOp }

func (noReduceAdd) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return (&binaryOp{kind: binAdd}).Forward(in)
}

func (noReduceAdd) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	g := gradOut[0]
	gb := tensor.New(in[1].Shape...)
	copy(gb.F32, g.F32) // wrong: takes the first row instead of summing rows
	return []*tensor.Tensor{g.Clone(), gb}, nil
}

// undeclaredNeeds reads its input in Backward but declares it needs none.
type undeclaredNeeds struct{ *unaryOp }

func (undeclaredNeeds) BackwardNeeds() (in, out []int) { return nil, nil }
