// Package explain computes attribution maps for an image classifier: which
// input pixels a chosen class score depends on, by several published methods.
package explain

import (
	"context"

	"heedmap/tensor"
)

// Map is a single-channel attribution map: H rows of W values, row-major.
// Methods return it in model-input space.
type Map struct {
	W, H int
	Data []float32
}

// Network is the differentiable classifier the methods query. The runtime
// satisfies it through an adapter; tests satisfy it with models whose
// attributions are known in closed form.
type Network interface {
	// InputShape is the model input shape in NCHW order; N may be -1
	// (any batch size).
	InputShape() []int
	// Forward returns the logits [N, K] for a batch x [N, C, H, W].
	Forward(ctx context.Context, x *tensor.Tensor) (*tensor.Tensor, error)
	// Gradient runs x forward, asks seed for ∂score/∂logits [N, K] given the
	// logits, and back-propagates it. It returns the logits, ∂score/∂x and,
	// when layer is not "", the activation at that layer and ∂score/∂layer.
	Gradient(ctx context.Context, x *tensor.Tensor, seed func(logits *tensor.Tensor) (*tensor.Tensor, error), layer string) (*Gradients, error)
}

// gradientRecycler is implemented by networks that can reuse the buffers
// of a Gradients result once its caller is done with it (the engine-backed
// network hands them back to its graph's arena, Graph.Recycle).
type gradientRecycler interface {
	recycle(g *Gradients)
}

// Gradients is what Network.Gradient returns.
type Gradients struct {
	Logits    *tensor.Tensor // [N, K]
	Input     *tensor.Tensor // same shape as x
	Layer     *tensor.Tensor // activation at the requested layer, or nil
	LayerGrad *tensor.Tensor // ∂score/∂activation, or nil
}
