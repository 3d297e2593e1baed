package explain

import (
	"context"

	"heedmap/tensor"
)

// Gradient is the saliency map of Simonyan, Vedaldi & Zisserman, "Deep
// Inside Convolutional Networks" (arXiv:1312.6034, 2014, §3.1): the
// derivative of the class score with respect to the input, w = ∂S_c/∂I at
// the image I₀, one back-propagation pass. For a multi-channel image the
// paper's map is M_ij = max_c |w_{c,i,j}|, which Map holds; Signed keeps the
// signed channel sum Σ_c w_c, which preserves direction (negative =
// evidence against the class) at the cost of letting channels cancel.
// Gradients are taken in model-input space, i.e. with respect to the
// normalised input.
type Gradient struct{}

func (Gradient) Name() string { return "gradient" }

func (Gradient) Attribute(ctx context.Context, net Network, x *tensor.Tensor, target Target) (*Result, error) {
	g, t, score, err := inputGradient(ctx, net, x, target)
	if err != nil {
		return nil, err
	}
	c, h, w := x.Shape[1], x.Shape[2], x.Shape[3]
	r := newResult("gradient", t, score)
	r.Map = maxAbs(g, c, h, w)
	r.Signed = channelSum(g, c, h, w)
	r.Channels = toTensor(g, c, h, w)
	return r, nil
}

// GradientTimesInput is the element-wise product of the input and the
// gradient, x ⊙ ∂S/∂x (Shrikumar, Greenside, Shcherbina & Kundaje, "Not
// Just a Black Box", arXiv:1605.01713, 2016), summed over channels. Both
// factors are in model-input space (after mean/std normalisation), so a
// pixel equal to the dataset mean gets zero attribution whatever its
// gradient: the implicit reference is the mean colour, not black. For a
// linear model it is exactly each input's contribution w_i·x_i to the score.
type GradientTimesInput struct{}

func (GradientTimesInput) Name() string { return "gradient-x-input" }

func (GradientTimesInput) Attribute(ctx context.Context, net Network, x *tensor.Tensor, target Target) (*Result, error) {
	g, t, score, err := inputGradient(ctx, net, x, target)
	if err != nil {
		return nil, err
	}
	for i := range g {
		g[i] *= float64(x.F32[i])
	}
	c, h, w := x.Shape[1], x.Shape[2], x.Shape[3]
	r := newResult("gradient-x-input", t, score)
	r.Map = channelSum(g, c, h, w)
	r.Signed = r.Map
	r.Channels = toTensor(g, c, h, w)
	return r, nil
}

// inputGradient resolves the target and returns ∂score/∂x in float64.
func inputGradient(ctx context.Context, net Network, x *tensor.Tensor, target Target) ([]float64, Target, float64, error) {
	c, h, w, err := geometry(net, x)
	if err != nil {
		return nil, target, 0, err
	}
	t, score, err := resolve(ctx, net, x, target)
	if err != nil {
		return nil, t, 0, err
	}
	g := make([]float64, c*h*w)
	err = gradients(ctx, net, 1, []int{c, h, w}, 1, func(_ int, dst []float32) { copy(dst, x.F32) }, t, "",
		func(_ int, _, grad, _, _ []float32) error {
			for i, v := range grad {
				g[i] = float64(v)
			}
			return nil
		})
	return g, t, score, err
}
