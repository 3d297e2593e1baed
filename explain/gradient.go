package explain

import (
	"context"
	"fmt"

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
	r.param("map", "max over channels of |gradient|")
	r.param("space", "model input")
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
	r.param("map", "sum over channels of x ⊙ gradient")
	r.param("space", "model input")
	return r, nil
}

// inputGradient resolves the target and returns ∂score/∂x in float64.
func inputGradient(ctx context.Context, net Network, x *tensor.Tensor, target Target) ([]float64, Target, float64, error) {
	if _, _, _, err := geometry(net, x); err != nil {
		return nil, target, 0, err
	}
	gr, t, score, err := gradientOnce(ctx, net, x, target, "")
	if err != nil {
		return nil, t, 0, err
	}
	g := make([]float64, len(x.F32))
	for i := range g {
		g[i] = float64(gr.Input.F32[i])
	}
	return g, t, score, nil
}

// gradientOnce runs one image through net.Gradient, resolving the target on
// the image's own logits inside the seed, so no separate forward pass is
// needed. A fixed-batch network gets the image repeated and row 0 is read
// (its seed rows are all the resolved target's).
func gradientOnce(ctx context.Context, net Network, x *tensor.Tensor, target Target, layer string) (*Gradients, Target, float64, error) {
	in := x
	b := net.InputShape()[0]
	if b > 1 {
		in = tensor.New(append([]int{b}, x.Shape[1:]...)...)
		for j := 0; j < b; j++ {
			copy(in.F32[j*len(x.F32):], x.F32)
		}
	}
	t := target
	var score float64
	seed := func(logits *tensor.Tensor) (*tensor.Tensor, error) {
		_, k, err := logitsShape(logits)
		if err != nil {
			return nil, err
		}
		if t, err = target.Resolve(logits.F32[:k]); err != nil {
			return nil, err
		}
		score = t.Eval(logits.F32[:k], nil)
		return t.Seed()(logits)
	}
	gr, err := net.Gradient(ctx, in, seed, layer)
	if err != nil {
		return nil, t, 0, err
	}
	if gr.Input == nil || gr.Input.Len() != in.Len() {
		return nil, t, 0, fmt.Errorf("explain: network returned no input gradient of shape %v", in.Shape)
	}
	if b > 1 {
		gr.Input = tensor.FromFloat32(gr.Input.F32[:len(x.F32)], x.Shape...)
		if gr.Layer != nil && len(gr.Layer.Shape) > 0 && gr.Layer.Shape[0] == b && gr.LayerGrad != nil {
			per := gr.Layer.Len() / b
			sh := append([]int{1}, gr.Layer.Shape[1:]...)
			gr.Layer = tensor.FromFloat32(gr.Layer.F32[:per], sh...)
			gr.LayerGrad = tensor.FromFloat32(gr.LayerGrad.F32[:per], sh...)
		}
	}
	return gr, t, score, nil
}
