package explain

import (
	"context"
	"fmt"
	"math"

	"heedmap/tensor"
)

// GradCAM is Gradient-weighted Class Activation Mapping (Selvaraju, Cogswell,
// Das, Vedantam, Parikh & Batra, ICCV 2017, eqs. 1–2): with A^k the K feature
// maps of a convolutional layer and y^c the class score,
//
//	α_k = (1/Z) Σ_ij ∂y^c/∂A^k_ij        (global-average-pooled gradient)
//	L   = ReLU(Σ_k α_k A^k)
//
// The paper takes y^c before the softmax, so use the Logit score kind (the
// default) to follow it; other kinds are allowed and say so in the result.
// Layer names the activation (a 4-D [1, K, h, w] tensor). Empty Layer is
// the automatic choice: the last 4-D activation before global pooling, asked
// of a Network that implements LayerChooser (FromGraph's networks do,
// through the runtime's Graph.GradCAMLayer). L is
// upsampled to the input size bilinearly with the half-pixel ("align
// corners = false") convention: output pixel centre (x + ½) samples the
// h×w map at x·w/W + ½·w/W − ½, clamped at the borders, so the upsampled map
// covers exactly the same extent as the layer's receptive-field grid
// assumption. Coarse holds L at the layer's resolution.
type GradCAM struct {
	Layer string // "" = automatic
}

// LayerChooser is implemented by networks that can name Grad-CAM's default
// layer, the last 4-D activation before global pooling.
type LayerChooser interface {
	GradCAMLayer() (string, error)
}

func (GradCAM) Name() string { return "grad-cam" }

func (g GradCAM) Attribute(ctx context.Context, net Network, x *tensor.Tensor, target Target) (*Result, error) {
	auto := g.Layer == ""
	if auto {
		lc, ok := net.(LayerChooser)
		if !ok {
			return nil, fmt.Errorf("explain: grad-cam: this network cannot choose a layer; name one")
		}
		l, err := lc.GradCAMLayer()
		if err != nil {
			return nil, fmt.Errorf("explain: grad-cam: %w (name a layer)", err)
		}
		g.Layer = l
	}
	_, h, w, err := geometry(net, x)
	if err != nil {
		return nil, err
	}
	gr, t, score, err := gradientOnce(ctx, net, x, target, g.Layer)
	if err != nil {
		return nil, err
	}
	a, da := gr.Layer, gr.LayerGrad
	if a == nil || da == nil || len(a.Shape) != 4 || a.Shape[0] != 1 || a.Len() != da.Len() || a.DType != tensor.Float32 || da.DType != tensor.Float32 {
		return nil, fmt.Errorf("explain: grad-cam: layer %q is not a [1, K, h, w] activation with a gradient (got %v)", g.Layer, a)
	}
	k, lh, lw := a.Shape[1], a.Shape[2], a.Shape[3]
	n := lh * lw
	cam := make([]float64, n)
	for c := 0; c < k; c++ {
		var alpha float64
		for _, v := range da.F32[c*n : (c+1)*n] {
			alpha += float64(v)
		}
		alpha /= float64(n)
		for i, v := range a.F32[c*n : (c+1)*n] {
			cam[i] += alpha * float64(v)
		}
	}
	coarse := Map{W: lw, H: lh, Data: make([]float32, n)}
	for i, v := range cam {
		coarse.Data[i] = float32(math.Max(v, 0))
	}
	r := newResult("grad-cam", t, score)
	r.Coarse = &coarse
	r.Map = Upsample(coarse, w, h)
	r.Signed = r.Map
	r.param("layer", g.Layer)
	r.param("layer_choice", map[bool]string{true: "automatic", false: "given"}[auto])
	r.param("layer_size", fmt.Sprintf("%dx%d", lw, lh))
	r.param("upsampling", "bilinear, half-pixel centres")
	if t.Score != Logit {
		r.Warnings = append(r.Warnings, fmt.Sprintf("grad-cam: explaining the %s score; the method is defined on the pre-softmax logit", t.Score))
	}
	return r, nil
}

// Upsample resizes a map bilinearly to w×h with the half-pixel convention
// (pixel centres aligned, edges clamped), as used for Grad-CAM.
func Upsample(m Map, w, h int) Map {
	out := Map{W: w, H: h, Data: make([]float32, w*h)}
	xs := axis(m.W, w)
	ys := axis(m.H, h)
	for y, ay := range ys {
		for x, ax := range xs {
			a := float64(m.Data[ay.i0*m.W+ax.i0])*(1-ax.f) + float64(m.Data[ay.i0*m.W+ax.i1])*ax.f
			b := float64(m.Data[ay.i1*m.W+ax.i0])*(1-ax.f) + float64(m.Data[ay.i1*m.W+ax.i1])*ax.f
			out.Data[y*w+x] = float32(a*(1-ay.f) + b*ay.f)
		}
	}
	return out
}

// tap is one output coordinate's two source indices and the weight of the
// second.
type tap struct {
	i0, i1 int
	f      float64
}

// axis precomputes the half-pixel bilinear taps from n source samples to m
// output samples.
func axis(n, m int) []tap {
	t := make([]tap, m)
	for d := range t {
		s := (float64(d)+0.5)*float64(n)/float64(m) - 0.5
		s = math.Min(math.Max(s, 0), float64(n-1))
		i0 := int(s)
		t[d] = tap{i0, min(i0+1, n-1), s - float64(i0)}
	}
	return t
}
