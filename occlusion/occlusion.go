// Package occlusion computes occlusion-sensitivity maps (Zeiler & Fergus,
// "Visualizing and Understanding Convolutional Networks", ECCV 2014, §4.2):
// a square patch is slid over the image, each position is filled with a
// neutral colour, and the drop in the class score is recorded.
//
//	map(p) = mean over windows w ∋ p of [score(x) − score(x with w filled)]
//
// Positive values mark pixels whose occlusion lowers the score (evidence
// for the class). Windows start at 0, S, 2S, … and one more window is added
// flush with the far edge when the stride does not land there, so every
// pixel is covered by at least one window. Each pixel's value is the mean
// over the windows that cover it; a pixel near an edge is covered by fewer
// windows, so its value is noisier, not smaller.
//
// The work is the number of windows times one forward pass each. The
// Evaluator interface is the seam for a faster exact implementation that
// recomputes only the part of each layer a window can reach (incremental
// inference over receptive fields, Nakandala et al., SIGMOD 2019); FullForward
// is the plain batched implementation.
package occlusion

import (
	"context"
	"fmt"
	"math"

	"heedmap/explain"
	"heedmap/tensor"
)

// FillKind is what an occluded window is filled with.
type FillKind int

const (
	// FillModelZero fills with zero in model-input space: the preprocessing
	// mean colour when mean/std normalisation is declared (the default, a
	// "grey" that carries no evidence on average). Without normalisation
	// model zero is black; Occlusion then returns a warning.
	FillModelZero FillKind = iota
	// FillImageMean fills with the image's own mean colour per channel.
	FillImageMean
	// FillBlack fills with RGB black expressed in model-input space.
	FillBlack
	// FillColor fills with Occlusion.Color (0–1 RGB).
	FillColor
	// FillBlur fills with a Gaussian-blurred copy of the image (σ =
	// BlurSigma), removing detail but not colour.
	FillBlur
)

func (f FillKind) String() string {
	return [...]string{"mean", "image-mean", "black", "color", "blur"}[f]
}

// ParseFill reads mean, image-mean, black, color or blur.
func ParseFill(s string) (FillKind, error) {
	if s == "" {
		return FillModelZero, nil
	}
	for f := FillModelZero; f <= FillBlur; f++ {
		if f.String() == s {
			return f, nil
		}
	}
	return 0, fmt.Errorf("occlusion: fill %q: want mean, image-mean, black, color or blur", s)
}

// Window is one occluded square (clipped to the image).
type Window struct{ X, Y, W, H int }

// Evaluator scores x with each window replaced by the corresponding pixels
// of fill; scores are returned in window order. target is resolved.
type Evaluator interface {
	Scores(ctx context.Context, net explain.Network, x, fill *tensor.Tensor, windows []Window, target explain.Target) ([]float64, error)
}

// Occlusion is the occlusion-sensitivity method; it satisfies
// explain.Method.
type Occlusion struct {
	// Patch and Stride in pixels; 0 = 16 and 8 at 224 pixels (values we
	// chose; the paper does not fix them), scaled with the shorter input
	// side.
	Patch, Stride int
	Fill          FillKind
	Color         [3]float32            // FillColor, 0–1 RGB
	BlurSigma     float64               // FillBlur, pixels; 0 = Patch/2
	Norm          explain.Normalization // the model's preprocessing
	BatchSize     int                   // FullForward batch; default 16
	Evaluator     Evaluator             // nil = Incremental (exact; FullForward for non-graph networks)
}

func (Occlusion) Name() string { return "occlusion" }

// Geometry returns the patch and stride used for an h×w input.
func (o Occlusion) Geometry(w, h int) (patch, stride int) {
	short := float64(min(w, h))
	patch, stride = o.Patch, o.Stride
	if patch <= 0 {
		patch = max(1, int(math.Round(16*short/224)))
	}
	if stride <= 0 {
		stride = max(1, int(math.Round(8*short/224)))
	}
	return patch, stride
}

// Origins returns window starts along an axis of n pixels: 0, s, 2s, … while
// the window fits, plus n − p when the last one stops short of the edge. A
// patch longer than the axis gives the single origin 0.
func Origins(n, p, s int) []int {
	if p >= n {
		return []int{0}
	}
	var o []int
	for x := 0; x+p <= n; x += s {
		o = append(o, x)
	}
	if last := o[len(o)-1]; last+p < n {
		o = append(o, n-p)
	}
	return o
}

// Windows lists the windows for a w×h input, row by row.
func Windows(w, h, patch, stride int) []Window {
	var out []Window
	for _, y := range Origins(h, patch, stride) {
		for _, x := range Origins(w, patch, stride) {
			out = append(out, Window{X: x, Y: y, W: min(patch, w), H: min(patch, h)})
		}
	}
	return out
}

// FillWarning is the message for a model-zero fill without normalisation,
// or "" when there is nothing to say.
func FillWarning(f FillKind, n explain.Normalization) string {
	if f == FillModelZero && !n.Normalized() {
		return "occlusion: no mean/std normalisation is declared, so the default fill (model-space zero) is black; black patches can look like dark-corner artefacts to the model"
	}
	return ""
}

// FillInput builds the fill picture [1, C, H, W] for x.
func (o Occlusion) FillInput(x *tensor.Tensor) (*tensor.Tensor, error) {
	c, h, w := x.Shape[1], x.Shape[2], x.Shape[3]
	n := h * w
	f := tensor.New(x.Shape...)
	uniform := func(v [3]float32) {
		for k := 0; k < c; k++ {
			for i := 0; i < n; i++ {
				f.F32[k*n+i] = v[min(k, 2)]
			}
		}
	}
	switch o.Fill {
	case FillModelZero:
	case FillImageMean:
		for k := 0; k < c; k++ {
			var s float64
			for _, v := range x.F32[k*n : (k+1)*n] {
				s += float64(v)
			}
			for i := 0; i < n; i++ {
				f.F32[k*n+i] = float32(s / float64(n))
			}
		}
	case FillBlack:
		uniform(o.Norm.Pixel([3]float32{}))
	case FillColor:
		uniform(o.Norm.Pixel(o.Color))
	case FillBlur:
		sigma := o.BlurSigma
		if sigma <= 0 {
			p, _ := o.Geometry(w, h)
			sigma = float64(p) / 2
		}
		return explain.Blur(x, sigma)
	default:
		return nil, fmt.Errorf("occlusion: unknown fill %d", o.Fill)
	}
	return f, nil
}

// Attribute computes the occlusion map of x [1, C, H, W].
func (o Occlusion) Attribute(ctx context.Context, net explain.Network, x *tensor.Tensor, target explain.Target) (*explain.Result, error) {
	if x == nil || x.DType != tensor.Float32 || len(x.Shape) != 4 || x.Shape[0] != 1 || len(x.F32) != x.Len() {
		return nil, fmt.Errorf("occlusion: input must be a float [1, C, H, W] tensor, got %v", x)
	}
	h, w := x.Shape[2], x.Shape[3]
	fill, err := o.FillInput(x)
	if err != nil {
		return nil, err
	}
	// Score of the unoccluded image, resolving "predicted class" on it.
	logits, err := explain.Logits(ctx, net, x)
	if err != nil {
		return nil, err
	}
	t, err := target.Resolve(logits)
	if err != nil {
		return nil, err
	}
	base := t.Eval(logits, nil)
	patch, stride := o.Geometry(w, h)
	wins := Windows(w, h, patch, stride)
	ev := o.Evaluator
	if ev == nil {
		ev = Incremental{BatchSize: o.BatchSize}
	}
	scores, err := ev.Scores(ctx, net, x, fill, wins, t)
	if err != nil {
		return nil, err
	}
	if len(scores) != len(wins) {
		return nil, fmt.Errorf("occlusion: evaluator returned %d scores for %d windows", len(scores), len(wins))
	}
	sum := make([]float64, h*w)
	cnt := make([]int, h*w)
	for i, win := range wins {
		d := base - scores[i]
		for y := win.Y; y < win.Y+win.H; y++ {
			for xx := win.X; xx < win.X+win.W; xx++ {
				sum[y*w+xx] += d
				cnt[y*w+xx]++
			}
		}
	}
	m := explain.Map{W: w, H: h, Data: make([]float32, h*w)}
	for i := range sum {
		m.Data[i] = float32(sum[i] / float64(cnt[i]))
	}
	r := explain.NewResult("occlusion", t, base)
	r.Map, r.Signed = m, m
	if msg := FillWarning(o.Fill, o.Norm); msg != "" {
		r.Warnings = append(r.Warnings, msg)
	}
	r.AddParam("patch", patch)
	r.AddParam("stride", stride)
	r.AddParam("windows", len(wins))
	r.AddParam("fill", o.Fill)
	switch o.Fill {
	case FillColor:
		r.AddParam("color", fmt.Sprintf("%g,%g,%g", o.Color[0], o.Color[1], o.Color[2]))
	case FillBlur:
		s := o.BlurSigma
		if s <= 0 {
			s = float64(patch) / 2
		}
		r.AddParam("blur_sigma_px", s)
	case FillModelZero:
		if !o.Norm.Normalized() {
			r.AddParam("fill_note", "black (no mean/std normalisation declared)")
		}
	}
	return r, nil
}

// FullForward evaluates every occluded copy with a full forward pass, in
// batches through Network.Forward.
type FullForward struct{ BatchSize int }

func (f FullForward) Scores(ctx context.Context, net explain.Network, x, fill *tensor.Tensor, windows []Window, target explain.Target) ([]float64, error) {
	h, w := x.Shape[2], x.Shape[3]
	n := h * w
	return explain.ForwardScores(ctx, net, len(windows), x.Shape[1:], f.BatchSize, func(i int, dst []float32) {
		copy(dst, x.F32)
		win := windows[i]
		for k := 0; k < x.Shape[1]; k++ {
			for y := win.Y; y < win.Y+win.H; y++ {
				row := k*n + y*w
				copy(dst[row+win.X:row+win.X+win.W], fill.F32[row+win.X:row+win.X+win.W])
			}
		}
	}, target)
}
