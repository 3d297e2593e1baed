package engine

// Reductions: ReduceSum, ReduceMean and (ops_reduce_more.go) the others.
//
// A reduction is the adjoint of broadcasting: summing x over some axes is
// exactly reduceToShape from x's shape to the "kept" shape (reduced axes
// set to 1), so both directions reuse the broadcast plan. Sums accumulate
// in float32 in input order, as the reference runtimes do for float tensors.

import (
	"fmt"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("ReduceSum", buildReduce(redSum))
	register("ReduceMean", buildReduce(redMean))
}

type redKind uint8

const (
	redSum redKind = iota
	redMean
	redMax
	redMin
	redProd
	redL1
	redL2
	redSumSquare
	redLogSum
	redLogSumExp
)

var redNames = [...]string{"ReduceSum", "ReduceMean", "ReduceMax", "ReduceMin", "ReduceProd", "ReduceL1", "ReduceL2", "ReduceSumSquare", "ReduceLogSum", "ReduceLogSumExp"}

// reduceOp reduces over axes taken from the attribute (ReduceSum before
// opset 13, the others before 18) or from optional input 1 afterwards.
// With no axes every axis is reduced, unless noop_with_empty_axes is set,
// in which case the op is the identity.
type reduceOp struct {
	kind      redKind
	mean      bool
	fromInput bool
	axes      []int64
	keepdims  bool
	noopEmpty bool
}

func buildReduce(kind redKind) Builder {
	return func(n *onnx.Node, env *Env) (Op, error) {
		inputSince := int64(18)
		if kind == redSum {
			inputSince = 13
		}
		r := &reduceOp{
			kind:      kind,
			mean:      kind == redMean,
			fromInput: env.Opset >= inputSince,
			axes:      n.Ints("axes"),
			keepdims:  n.Int("keepdims", 1) != 0,
			noopEmpty: n.Int("noop_with_empty_axes", 0) != 0,
		}
		if r.fromInput && n.Has("axes") {
			return nil, fmt.Errorf("%s: attribute axes is not allowed at opset %d (axes is an input)", r.name(), env.Opset)
		}
		return r, nil
	}
}

func (r *reduceOp) name() string { return redNames[r.kind] }

// shapes returns the kept shape (reduced axes as 1), the output shape, the
// number of elements reduced into each output, and whether the op is a
// no-op.
func (r *reduceOp) shapes(in []*tensor.Tensor) (kept, out []int, count int, noop bool, err error) {
	x := in[0]
	axes := r.axes
	if r.fromInput {
		if axes, err = shInts(shOptional(in, 1), r.name()+": axes"); err != nil {
			return
		}
	}
	rank := len(x.Shape)
	reduce := make([]bool, rank)
	if len(axes) == 0 {
		if r.noopEmpty {
			return x.Shape, x.Shape, 1, true, nil
		}
		for d := range reduce {
			reduce[d] = true
		}
	}
	for _, a := range axes {
		d, e := shAxis(a, rank)
		if e != nil {
			err = fmt.Errorf("%s: %v", r.name(), e)
			return
		}
		reduce[d] = true
	}
	count = 1
	kept = make([]int, rank)
	out = []int{}
	for d, v := range x.Shape {
		if reduce[d] {
			kept[d] = 1
			count *= v
			if r.keepdims {
				out = append(out, 1)
			}
		} else {
			kept[d] = v
			out = append(out, v)
		}
	}
	return kept, out, count, false, nil
}

func (r *reduceOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, r.name()); err != nil {
		return nil, err
	}
	x := in[0]
	kept, out, count, noop, err := r.shapes(in)
	if err != nil {
		return nil, err
	}
	if noop {
		return []*tensor.Tensor{x.Clone()}, nil
	}
	if r.kind > redMean {
		return r.forwardOther(x, kept, out)
	}
	if x.DType == tensor.Float32 {
		s, err := reduceToShape(x.F32, x.Shape, kept)
		if err != nil {
			return nil, err
		}
		s = ownCopy(s, x.F32)
		if r.mean && count > 0 {
			inv := 1 / float32(count)
			for i := range s {
				s[i] *= inv
			}
		}
		return []*tensor.Tensor{{DType: tensor.Float32, Shape: out, F32: s}}, nil
	}
	// Integer sums (shape arithmetic); the mean truncates like C.
	p, err := newBcastPlan(x.Shape, kept)
	if err != nil {
		return nil, err
	}
	acc := make([]int64, tensor.Numel(kept))
	p.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			acc[offs[0]+i*steps[0]] += x.I64[o+i]
		}
	})
	if r.mean && count > 0 {
		for i := range acc {
			acc[i] /= int64(count)
		}
	}
	return []*tensor.Tensor{{DType: tensor.Int64, Shape: out, I64: acc}}, nil
}

// Backward broadcasts the output gradient back over the reduced axes
// (divided by the count for the mean).
func (r *reduceOp) Backward(in, outs, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, len(in))
	g := gradOut[0]
	x := in[0]
	if g == nil || x.DType != tensor.Float32 {
		return grads, nil
	}
	kept, _, count, noop, err := r.shapes(in)
	if err != nil {
		return nil, err
	}
	if noop {
		grads[0] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), x.Shape...), F32: append([]float32(nil), g.F32...)}
		return grads, nil
	}
	if r.kind > redMean {
		gx, err := r.backwardOther(x, outs[0], g, kept)
		if err != nil {
			return nil, err
		}
		grads[0] = gx
		return grads, nil
	}
	gx, err := expandF32(g.F32, kept, x.Shape)
	if err != nil {
		return nil, err
	}
	if r.mean && count > 0 {
		inv := 1 / float32(count)
		for i := range gx {
			gx[i] *= inv
		}
	}
	grads[0] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), x.Shape...), F32: gx}
	return grads, nil
}

func (r *reduceOp) BackwardNeeds() (in, out []int) {
	if r.kind > redMean {
		return []int{0, 1}, []int{0}
	}
	return []int{1}, nil
}
