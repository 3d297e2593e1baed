package engine

import (
	"fmt"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("Flatten", buildFlatten)
	register("Reshape", buildReshape)
	register("Identity", buildIdentity)
	register("Dropout", buildDropout)
	register("Constant", buildConstant)
}

// view returns a tensor sharing x's data with a new shape. Views are safe
// because no op writes into its inputs.
func view(x *tensor.Tensor, shape []int) *tensor.Tensor {
	return &tensor.Tensor{DType: x.DType, Shape: shape, F32: x.F32, I64: x.I64}
}

// reshapeGrad is the backward of every view: the gradient takes the input's
// shape.
func reshapeGrad(in, gradOut []*tensor.Tensor) []*tensor.Tensor {
	res := make([]*tensor.Tensor, len(in))
	if g := gradOut[0]; g != nil {
		res[0] = view(g, append([]int(nil), in[0].Shape...))
	}
	return res
}

type flattenOp struct{ axis int64 }

func buildFlatten(n *onnx.Node, env *Env) (Op, error) {
	return &flattenOp{axis: n.Int("axis", 1)}, nil
}

func (op *flattenOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x := in[0]
	axis := int(op.axis)
	if axis < 0 {
		axis += len(x.Shape)
	}
	if axis < 0 || axis > len(x.Shape) {
		return nil, fmt.Errorf("axis %d out of range for shape %v", op.axis, x.Shape)
	}
	return []*tensor.Tensor{view(x, []int{tensor.Numel(x.Shape[:axis]), tensor.Numel(x.Shape[axis:])})}, nil
}

func (op *flattenOp) BackwardNeeds() (in, out []int) { return nil, nil }

func (op *flattenOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return reshapeGrad(in, gradOut), nil
}

// reshapeOp is Reshape; before opset 5 the target shape is an attribute.
type reshapeOp struct {
	allowZero bool
	shape     []int64 // opset < 5
}

func buildReshape(n *onnx.Node, env *Env) (Op, error) {
	op := &reshapeOp{allowZero: n.Int("allowzero", 0) != 0}
	if env.Opset < 5 {
		if !n.Has("shape") {
			return nil, fmt.Errorf("Reshape-1 needs the shape attribute")
		}
		op.shape = n.Ints("shape")
	} else if len(n.Inputs) < 2 || n.Inputs[1] == "" {
		return nil, fmt.Errorf("Reshape needs the shape input")
	}
	return op, nil
}

// target resolves the requested shape: 0 copies the input dim (unless
// allowzero), one −1 takes whatever size is left.
func (op *reshapeOp) target(x []int, req []int64) ([]int, error) {
	out := make([]int, len(req))
	infer := -1
	known := 1
	for i, d := range req {
		switch {
		case d == -1:
			if infer >= 0 {
				return nil, fmt.Errorf("shape %v has more than one -1", req)
			}
			infer = i
			continue
		case d == 0 && !op.allowZero:
			if i >= len(x) {
				return nil, fmt.Errorf("shape %v copies dimension %d of %v, which does not exist", req, i, x)
			}
			out[i] = x[i]
		case d < 0:
			return nil, fmt.Errorf("shape %v has a negative entry", req)
		default:
			out[i] = int(d)
		}
		known *= out[i]
	}
	n := tensor.Numel(x)
	if infer >= 0 {
		if known == 0 || n%known != 0 {
			return nil, fmt.Errorf("cannot reshape %v to %v", x, req)
		}
		out[infer] = n / known
	}
	if tensor.Numel(out) != n {
		return nil, fmt.Errorf("cannot reshape %v (%d elements) to %v", x, n, req)
	}
	return out, nil
}

func (op *reshapeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x := in[0]
	req := op.shape
	if req == nil {
		s := in[1]
		if s == nil || s.DType != tensor.Int64 || len(s.Shape) != 1 {
			return nil, fmt.Errorf("shape input must be a 1-D int64 tensor, got %v", s)
		}
		req = s.I64
	}
	shape, err := op.target(x.Shape, req)
	if err != nil {
		return nil, err
	}
	return []*tensor.Tensor{view(x, shape)}, nil
}

func (op *reshapeOp) BackwardNeeds() (in, out []int) { return nil, nil }

func (op *reshapeOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return reshapeGrad(in, gradOut), nil
}

type identityOp struct{}

func buildIdentity(n *onnx.Node, env *Env) (Op, error) { return identityOp{}, nil }

func (identityOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if in[0] == nil {
		return nil, fmt.Errorf("Identity of an absent (optional) value is not supported")
	}
	return []*tensor.Tensor{in[0]}, nil
}

func (identityOp) BackwardNeeds() (in, out []int) { return nil, nil }

func (identityOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return []*tensor.Tensor{gradOut[0]}, nil
}

// dropoutOp is Dropout at inference: the identity, with an all-true mask
// when the mask output is requested. Training mode is refused because its
// output is random.
type dropoutOp struct{}

func buildDropout(n *onnx.Node, env *Env) (Op, error) {
	if env.Opset < 7 && n.Has("is_test") && n.Int("is_test", 0) == 0 {
		return nil, fmt.Errorf("is_test=0 (training mode) is not supported")
	}
	if n.Int("training_mode", 0) != 0 {
		return nil, fmt.Errorf("training_mode is not supported")
	}
	return dropoutOp{}, nil
}

func (dropoutOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x := in[0]
	if len(in) > 2 && in[2] != nil {
		t := in[2]
		if len(t.I64) > 0 && t.I64[0] != 0 {
			ratio := float32(0.5)
			if in[1] != nil && len(in[1].F32) > 0 {
				ratio = in[1].F32[0]
			}
			if ratio != 0 {
				return nil, fmt.Errorf("training_mode=true with ratio %g is random and not supported", ratio)
			}
		}
	}
	mask := &tensor.Tensor{DType: tensor.Bool, Shape: append([]int(nil), x.Shape...), I64: make([]int64, x.Len())}
	for i := range mask.I64 {
		mask.I64[i] = 1
	}
	return []*tensor.Tensor{x, mask}, nil
}

func (dropoutOp) BackwardNeeds() (in, out []int) { return nil, nil }

func (dropoutOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return []*tensor.Tensor{gradOut[0]}, nil
}

// constantOp holds a Constant node's value; Compile folds it, so Forward
// runs once.
type constantOp struct{ v *tensor.Tensor }

func buildConstant(n *onnx.Node, env *Env) (Op, error) {
	var v *tensor.Tensor
	set := 0
	for name, a := range n.Attrs {
		switch name {
		case "value":
			if a.Tensor == nil {
				return nil, fmt.Errorf("value attribute holds no tensor")
			}
			v = a.Tensor
		case "value_float":
			v = tensor.FromFloat32([]float32{a.Float})
		case "value_floats":
			v = tensor.FromFloat32(append([]float32(nil), a.Floats...), len(a.Floats))
		case "value_int":
			v = tensor.FromInt64([]int64{a.Int})
		case "value_ints":
			v = tensor.FromInt64(append([]int64(nil), a.Ints...), len(a.Ints))
		case "value_string", "value_strings", "sparse_value":
			return nil, fmt.Errorf("Constant %s is not supported", name)
		default:
			continue
		}
		set++
	}
	if set != 1 {
		return nil, fmt.Errorf("Constant needs exactly one value attribute, has %d", set)
	}
	return &constantOp{v: v}, nil
}

func (op *constantOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return []*tensor.Tensor{op.v}, nil
}
