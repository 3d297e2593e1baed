package explain

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"

	"heedmap/tensor"
)

// BaselineKind is integrated gradients' reference input x′.
type BaselineKind int

const (
	// BaselineBlack is a black picture expressed in model-input space (the
	// normalised value of RGB 0,0,0), the paper's choice for images.
	BaselineBlack BaselineKind = iota
	// BaselineMean is the picture's own mean colour, per channel.
	BaselineMean
	// BaselineBlur is a Gaussian-blurred copy of the picture (σ = BlurSigma).
	BaselineBlur
	// BaselineNoise is uniform noise in [0,1] RGB, seeded.
	BaselineNoise
)

func (b BaselineKind) String() string {
	return [...]string{"black", "mean", "blur", "noise"}[b]
}

// ParseBaseline reads black, mean, blur or noise.
func ParseBaseline(s string) (BaselineKind, error) {
	for b := BaselineBlack; b <= BaselineNoise; b++ {
		if b.String() == s {
			return b, nil
		}
	}
	if s == "" {
		return BaselineBlack, nil
	}
	return 0, fmt.Errorf("explain: baseline %q: want black, mean, blur or noise", s)
}

// IntegratedGradients is the path attribution of Sundararajan, Taly & Yan,
// "Axiomatic Attribution for Deep Networks" (ICML 2017, eq. 1):
//
//	IG_i(x) = (x_i − x′_i) ∫₀¹ ∂F(x′ + α(x − x′))/∂x_i dα
//
// approximated with Steps quadrature nodes (Quadrature; midpoint by
// default). The paper's completeness axiom, Σ_i IG_i = F(x) − F(x′), holds
// for the exact integral; Result.Gap reports the relative error of the
// approximation, |Σ IG − (F(x) − F(x′))| / |F(x) − F(x′)|, so a user can add
// steps until it is small (the paper suggests 20–300 steps, within 5 %).
// Everything is in model-input space: x′ is the baseline after
// normalisation. The steps are evaluated in batches of BatchSize.
type IntegratedGradients struct {
	Steps      int           // default 64
	Quadrature Quadrature    // default Midpoint
	Baseline   BaselineKind  // default BaselineBlack
	Norm       Normalization // maps black/noise colours to model space
	BlurSigma  float64       // pixels, for BaselineBlur; default W/16 (value we chose: removes lesion texture, keeps the overall colour layout)
	Seed       uint64        // for BaselineNoise
	BatchSize  int           // default 16
}

func (IntegratedGradients) Name() string { return "integrated-gradients" }

// BaselineInput builds the baseline x′ for x.
func (ig IntegratedGradients) BaselineInput(x *tensor.Tensor) (*tensor.Tensor, error) {
	if x == nil || len(x.Shape) != 4 || x.DType != tensor.Float32 {
		return nil, fmt.Errorf("explain: baseline wants a float [1, C, H, W] tensor, got %v", x)
	}
	c, h, w := x.Shape[1], x.Shape[2], x.Shape[3]
	n := h * w
	b := tensor.New(x.Shape...)
	switch ig.Baseline {
	case BaselineBlack:
		v := ig.Norm.Pixel([3]float32{})
		for k := 0; k < c; k++ {
			for i := 0; i < n; i++ {
				b.F32[k*n+i] = v[min(k, 2)]
			}
		}
	case BaselineMean:
		for k := 0; k < c; k++ {
			var s float64
			for _, v := range x.F32[k*n : (k+1)*n] {
				s += float64(v)
			}
			for i := 0; i < n; i++ {
				b.F32[k*n+i] = float32(s / float64(n))
			}
		}
	case BaselineBlur:
		sigma := ig.BlurSigma
		if sigma <= 0 {
			sigma = float64(w) / 16
		}
		return Blur(x, sigma)
	case BaselineNoise:
		rng := rand.New(rand.NewPCG(ig.Seed, 0x1e5ee))
		for i := 0; i < n; i++ {
			v := ig.Norm.Pixel([3]float32{rng.Float32(), rng.Float32(), rng.Float32()})
			for k := 0; k < c; k++ {
				b.F32[k*n+i] = v[min(k, 2)]
			}
		}
	default:
		return nil, fmt.Errorf("explain: unknown baseline %d", ig.Baseline)
	}
	return b, nil
}

// params records the resolved settings.
func (ig IntegratedGradients) params(r *Result, steps, w int) {
	r.param("steps", steps)
	r.param("quadrature", ig.Quadrature)
	r.param("baseline", ig.Baseline)
	switch ig.Baseline {
	case BaselineBlur:
		s := ig.BlurSigma
		if s <= 0 {
			s = float64(w) / 16
		}
		r.param("blur_sigma_px", s)
	case BaselineNoise:
		r.param("seed", ig.Seed)
	}
}

func (ig IntegratedGradients) Attribute(ctx context.Context, net Network, x *tensor.Tensor, target Target) (*Result, error) {
	c, h, w, err := geometry(net, x)
	if err != nil {
		return nil, err
	}
	base, err := ig.BaselineInput(x)
	if err != nil {
		return nil, err
	}
	t, score, err := resolve(ctx, net, x, target)
	if err != nil {
		return nil, err
	}
	steps := ig.Steps
	if steps == 0 {
		steps = 64
	}
	alpha, weight, err := ig.Quadrature.Nodes(steps)
	if err != nil {
		return nil, err
	}
	img := []int{c, h, w}
	bs, err := ForwardScores(ctx, net, 1, img, 1, func(_ int, dst []float32) { copy(dst, base.F32) }, t)
	if err != nil {
		return nil, err
	}
	acc := make([]float64, c*h*w)
	err = gradients(ctx, net, steps, img, ig.BatchSize, func(k int, dst []float32) {
		a := float32(alpha[k])
		for i := range dst {
			dst[i] = base.F32[i] + a*(x.F32[i]-base.F32[i])
		}
	}, t, "", func(k int, _, grad, _, _ []float32) error {
		wk := weight[k]
		for i, g := range grad {
			acc[i] += wk * float64(g)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	var total float64
	for i := range acc {
		acc[i] *= float64(x.F32[i]) - float64(base.F32[i])
		total += acc[i]
	}
	r := newResult("integrated-gradients", t, score)
	r.Baseline = bs[0]
	// With F(x) = F(x′) the relative gap is undefined (0/0 when IG sums
	// to zero too); report the absolute residual then, and say so.
	if diff := score - bs[0]; diff != 0 {
		r.Gap = math.Abs(total-diff) / math.Abs(diff)
	} else {
		r.Gap = math.Abs(total)
		r.Warnings = append(r.Warnings, "integrated gradients: F(x) = F(x′), so the completeness gap is the absolute residual |Σ IG|")
	}
	r.Map = channelSum(acc, c, h, w)
	r.Signed = r.Map
	r.Channels = toTensor(acc, c, h, w)
	ig.params(r, steps, w)
	if r.Gap > 0.05 {
		r.Warnings = append(r.Warnings, fmt.Sprintf("integrated gradients: completeness gap %.1f%% with %d steps; consider more steps", 100*r.Gap, steps))
	}
	return r, nil
}
