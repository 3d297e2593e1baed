package explain

import (
	"context"
	"fmt"
	"math/rand/v2"

	"heedmap/tensor"
)

// RISE is Randomized Input Sampling for Explanation (Petsiuk, Das & Saenko,
// BMVC 2018, arXiv:1806.07421, §3): the saliency of pixel λ is the expected
// score over random masks M given that λ is kept,
//
//	S(λ) ≈ 1/(N·p) Σ_{i=1..N} f(x ⊙ M_i) · M_i(λ)
//
// Masks are generated as the paper describes: an s×s grid whose cells are 1
// with probability p, upsampled bilinearly to (s+1)·C with cell size
// C = ⌈H/s⌉ (per axis), then cropped to H×W at a uniformly random offset in
// [0, C) per axis, so the mask edges do not line up with a fixed grid.
// The product x ⊙ M is taken in model-input space: masked-out pixels move
// towards zero, which is black without normalisation (the paper's setting)
// and the dataset mean colour with it. Masks are drawn in sequence from a
// PCG generator seeded with Seed and evaluated in batches of BatchSize.
type RISE struct {
	Masks     int     // N, default 2000
	Grid      int     // s, default 7
	P         float64 // keep probability p, default 0.5
	Seed      uint64
	BatchSize int // default 16
}

func (RISE) Name() string { return "rise" }

// MaskGen draws RISE masks for one input size; it holds the precomputed
// upsampling taps and the random stream.
type MaskGen struct {
	w, h, s, cw, ch int
	p               float64
	xs, ys          []tap
	grid            []float64
	rng             *rand.Rand
}

// NewMaskGen prepares mask generation for a w×h input.
func NewMaskGen(w, h, s int, p float64, seed uint64) (*MaskGen, error) {
	if s < 1 || w < 1 || h < 1 || p <= 0 || p > 1 {
		return nil, fmt.Errorf("explain: rise: grid %d, size %d×%d, p %g: want grid ≥ 1 and 0 < p ≤ 1", s, w, h, p)
	}
	cw, ch := (w+s-1)/s, (h+s-1)/s
	return &MaskGen{w: w, h: h, s: s, cw: cw, ch: ch, p: p,
		xs: axis(s, (s+1)*cw), ys: axis(s, (s+1)*ch),
		grid: make([]float64, s*s), rng: rand.New(rand.NewPCG(seed, 0x815e))}, nil
}

// Next writes the next mask (h×w values in [0,1]) into dst.
func (g *MaskGen) Next(dst []float32) {
	for i := range g.grid {
		g.grid[i] = 0
		if g.rng.Float64() < g.p {
			g.grid[i] = 1
		}
	}
	ox, oy := g.rng.IntN(g.cw), g.rng.IntN(g.ch)
	s := g.s
	for y := 0; y < g.h; y++ {
		ay := g.ys[y+oy]
		for x := 0; x < g.w; x++ {
			ax := g.xs[x+ox]
			a := g.grid[ay.i0*s+ax.i0]*(1-ax.f) + g.grid[ay.i0*s+ax.i1]*ax.f
			b := g.grid[ay.i1*s+ax.i0]*(1-ax.f) + g.grid[ay.i1*s+ax.i1]*ax.f
			dst[y*g.w+x] = float32(a*(1-ay.f) + b*ay.f)
		}
	}
}

func (r RISE) Attribute(ctx context.Context, net Network, x *tensor.Tensor, target Target) (*Result, error) {
	c, h, w, err := geometry(net, x)
	if err != nil {
		return nil, err
	}
	t, score, err := resolve(ctx, net, x, target)
	if err != nil {
		return nil, err
	}
	n, s, p := r.Masks, r.Grid, r.P
	if n == 0 {
		n = 2000
	}
	if s == 0 {
		s = 7
	}
	if p == 0 {
		p = 0.5
	}
	if n < 0 {
		return nil, fmt.Errorf("explain: rise: %d masks", n)
	}
	gen, err := NewMaskGen(w, h, s, p, r.Seed)
	if err != nil {
		return nil, err
	}
	b := requestedBatch(net, r.BatchSize)
	hw := h * w
	masks := make([]float32, b*hw) // masks of the current batch
	acc := make([]float64, hw)
	for start := 0; start < n; start += b {
		m := min(b, n-start)
		for j := 0; j < m; j++ {
			gen.Next(masks[j*hw : (j+1)*hw])
		}
		scores, err := ForwardScores(ctx, net, m, []int{c, h, w}, b, func(i int, dst []float32) {
			mk := masks[(i-0)*hw : (i+1)*hw]
			for k := 0; k < c; k++ {
				for q := 0; q < hw; q++ {
					dst[k*hw+q] = x.F32[k*hw+q] * mk[q]
				}
			}
		}, t)
		if err != nil {
			return nil, err
		}
		for j := 0; j < m; j++ {
			sj := scores[j]
			mk := masks[j*hw : (j+1)*hw]
			for q := range acc {
				acc[q] += sj * float64(mk[q])
			}
		}
	}
	res := newResult("rise", t, score)
	res.Map = Map{W: w, H: h, Data: make([]float32, hw)}
	for q, v := range acc {
		res.Map.Data[q] = float32(v / (float64(n) * p))
	}
	res.Signed = res.Map
	res.param("masks", n)
	res.param("grid", s)
	res.param("p", p)
	res.param("seed", r.Seed)
	return res, nil
}
