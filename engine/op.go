// Package engine compiles a decoded ONNX graph into an execution plan and runs
// it forward and backward (reverse mode) on float32 CPU tensors.
package engine

import (
	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

// Op is one compiled node. Forward receives the node's inputs in ONNX order;
// an omitted optional input is nil. It must not modify its inputs and must not
// return a tensor that aliases an input's data unless the op is a pure view
// (Identity, Reshape, ...) and documents it.
type Op interface {
	Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error)
}

// Differentiable is implemented by ops that back-propagate. Backward gets the
// forward inputs and outputs and the gradient of the score with respect to
// each output (nil where none flows) and returns one gradient per input, nil
// for inputs that are not differentiable (indices, shapes) or receive none.
type Differentiable interface {
	Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error)
}

// Env is what an operator builder may use: the kernels and the opset of the
// node's domain.
type Env struct {
	GEMM  kernel.GEMM
	Opset int64
	// arena, when set, supplies reusable output buffers (see arena.go).
	arena *arena
	// team, when set, runs convolutions' parallel phases (team.go).
	team *team
	// scratch, when set, lends work buffers shared by the Graph's
	// operators (scratch.go).
	scratch *scratch
}

// Builder compiles one node, validating its attributes.
type Builder func(n *onnx.Node, env *Env) (Op, error)
