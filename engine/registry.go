package engine

// Operator registration.
//
// Convention for every file that implements operators in this package:
//
//   - Each operator file registers its builders from an init function:
//
//	func init() {
//		register("Relu", buildRelu)
//		register("Add", buildAdd)
//	}
//
//   - register may be called only from init functions. The table it fills
//     is then read-only for the life of the program, so concurrent Compile
//     calls need no lock (this is the only package-level table, and it is
//     never mutated after init).
//   - Op types are ONNX op_type strings of the default domain ("" or
//     "ai.onnx"); nodes of any other domain are reported as unsupported.
//   - A builder validates the node's attributes once, using env.Opset (the
//     model's opset for the node's domain) to pick version-specific
//     semantics, and returns an Op that holds everything precomputed. A
//     builder returns an error naming the attribute that is wrong; Compile
//     adds the node name and op type.
//   - Forward must not modify its inputs. It must not return a slice aliasing
//     an input's data unless the op is a pure view (Identity, Reshape,
//     Flatten, Squeeze, Unsqueeze): the runtime frees values after their last
//     use, and an aliased result only survives because the runtime keeps the
//     underlying slice reachable through the output tensor.
//   - Ops that back-propagate implement Differentiable. An op that does not
//     need every forward input and output in Backward should also implement
//     BackwardNeeder, so a forward pass run for Backward retains less memory.
//     Entries it does not ask for are passed to Backward as tensors carrying
//     only DType and Shape (F32 and I64 nil), so shape-dependent backward
//     code (broadcast reduction) still works.
//   - Registering the same op type twice panics at init time: it is a
//     programming error caught by any test run.

import (
	"fmt"

	"heedmap/tensor"
)

// builders maps op type to builder. Written only by register from init
// functions; read-only afterwards.
var builders = map[string]Builder{}

// register adds the builder for opType. Call it only from init functions.
func register(opType string, b Builder) {
	if _, dup := builders[opType]; dup {
		panic(fmt.Sprintf("engine: operator %q registered twice", opType))
	}
	builders[opType] = b
}

// lookup returns the builder for opType of the default ONNX domain.
func lookup(opType string) (Builder, bool) {
	b, ok := builders[opType]
	return b, ok
}

// BackwardNeeder is optionally implemented by Differentiable ops to declare
// which forward values Backward reads. in and out are the indices (into the
// node's inputs and outputs) whose data Backward needs; the rest are passed
// to Backward as shape-only tensors. Ops that do not implement it keep all
// their inputs and outputs alive until Backward.
type BackwardNeeder interface {
	BackwardNeeds() (in, out []int)
}

// shapeOnly returns a tensor that carries t's dtype and shape but no data,
// the stand-in for a forward value Backward declared it does not need.
func shapeOnly(t *tensor.Tensor) *tensor.Tensor {
	if t == nil {
		return nil
	}
	return &tensor.Tensor{DType: t.DType, Shape: append([]int(nil), t.Shape...)}
}

// SelectiveBackward is optionally implemented by Differentiable ops whose
// input gradients differ much in cost, typically ops with weights: an
// attribution needs ∂/∂activation and never ∂/∂weight, and for Conv the
// weight gradient costs as much as the whole forward pass.
//
// need[i] reports whether input i can receive a gradient (it depends on a
// graph input); BackwardNeedsFor declares the forward values Backward then
// reads (so a Conv whose weights are constants does not keep its input
// alive), and BackwardFor returns nil for inputs with need[i] false. The
// engine calls BackwardNeedsFor once at compile time with the inputs that
// depend on a graph input and BackwardFor with a subset of them.
type SelectiveBackward interface {
	BackwardNeedsFor(need []bool) (in, out []int)
	BackwardFor(in, out, gradOut []*tensor.Tensor, need []bool) ([]*tensor.Tensor, error)
}
