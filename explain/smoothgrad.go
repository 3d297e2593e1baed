package explain

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"

	"heedmap/tensor"
)

// SmoothGrad averages a gradient-based map over noisy copies of the input
// (Smilkov, Thorat, Kim, Viégas & Wattenberg, "SmoothGrad: removing noise by
// adding noise", arXiv:1706.03825, 2017, eq. 3):
//
//	M̂(x) = (1/n) Σ_{k=1..n} M(x + N(0, σ²))
//
// with σ given as a fraction of the input's range, σ = Sigma·(max x − min x)
// (the paper's "noise level"; it finds 10–20 % works well). M is the
// gradient saliency map (Map = mean over samples of max_c |∂S/∂x|, Signed =
// channel sum of the mean gradient), or, when OverIG is set, integrated
// gradients (Map = Signed = mean of the IG maps; this costs n·Steps
// gradients). Noise is drawn from a PCG generator seeded with Seed, in a
// fixed order, so the map does not depend on the batch size.
type SmoothGrad struct {
	Samples   int                  // n, default 25
	Sigma     float64              // fraction of the input range, default 0.15; 0 means the default, use a negative value for none
	Seed      uint64               // noise seed
	BatchSize int                  // default 16
	OverIG    *IntegratedGradients // if set, smooth integrated gradients instead of the gradient
}

func (s SmoothGrad) Name() string {
	if s.OverIG != nil {
		return "smoothgrad-ig"
	}
	return "smoothgrad"
}

func (s SmoothGrad) Attribute(ctx context.Context, net Network, x *tensor.Tensor, target Target) (*Result, error) {
	c, h, w, err := geometry(net, x)
	if err != nil {
		return nil, err
	}
	t, score, err := resolve(ctx, net, x, target)
	if err != nil {
		return nil, err
	}
	n := s.Samples
	if n == 0 {
		n = 25
	}
	if n < 0 {
		return nil, fmt.Errorf("explain: smoothgrad: %d samples", n)
	}
	frac := s.Sigma
	if frac == 0 {
		frac = 0.15
	}
	frac = math.Max(frac, 0)
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, v := range x.F32 {
		lo, hi = math.Min(lo, float64(v)), math.Max(hi, float64(v))
	}
	sigma := frac * (hi - lo)
	size := c * h * w
	// Draw all noise up front, in sample order: reproducible whatever the
	// batching. n·size float32 (25 × 150k = 15 MB at 224²).
	noise := make([]float32, n*size)
	rng := rand.New(rand.NewPCG(s.Seed, 0x5300_7468))
	for i := range noise {
		noise[i] = float32(sigma * rng.NormFloat64())
	}
	noisy := func(k int, dst []float32) {
		for i := range dst {
			dst[i] = x.F32[i] + noise[k*size+i]
		}
	}
	mean := make([]float64, size)
	mapAcc := make([]float64, h*w)
	r := newResult(s.Name(), t, score)
	r.param("samples", n)
	r.param("sigma_fraction", frac)
	r.param("sigma", sigma)
	r.param("seed", s.Seed)
	if s.OverIG != nil {
		xk := tensor.New(x.Shape...)
		for k := 0; k < n; k++ {
			noisy(k, xk.F32)
			ri, err := s.OverIG.Attribute(ctx, net, xk, t)
			if err != nil {
				return nil, err
			}
			for i, v := range ri.Channels.F32 {
				mean[i] += float64(v) / float64(n)
			}
		}
		r.Map = channelSum(mean, c, h, w)
		r.Signed = r.Map
		r.Channels = toTensor(mean, c, h, w)
		r.param("over", "integrated-gradients")
		steps := s.OverIG.Steps
		if steps == 0 {
			steps = 64
		}
		sub := &Result{}
		s.OverIG.params(sub, steps, w)
		for _, p := range sub.Params {
			r.param("ig_"+p.Name, p.Value)
		}
		return r, nil
	}
	err = gradients(ctx, net, n, []int{c, h, w}, s.BatchSize, noisy, t, "", func(_ int, _, grad, _, _ []float32) error {
		for i, g := range grad {
			mean[i] += float64(g)
		}
		for p := 0; p < h*w; p++ {
			var m float64
			for k := 0; k < c; k++ {
				m = math.Max(m, math.Abs(float64(grad[k*h*w+p])))
			}
			mapAcc[p] += m
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	// Sums are divided at the end: with σ = 0, n equal float32 gradients
	// sum exactly in float64 and the mean is the gradient bit for bit.
	for i := range mean {
		mean[i] /= float64(n)
	}
	r.Map = Map{W: w, H: h, Data: make([]float32, h*w)}
	for i, v := range mapAcc {
		r.Map.Data[i] = float32(v / float64(n))
	}
	r.Signed = channelSum(mean, c, h, w)
	r.Channels = toTensor(mean, c, h, w)
	r.param("over", "gradient")
	return r, nil
}
