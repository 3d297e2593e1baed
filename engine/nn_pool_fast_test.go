package engine

import (
	"math"
	"math/rand/v2"
	"testing"
)

// pool3x3Case is one geometry of the 3×3 max-pool fast-path tests:
// strides, asymmetric and ceil-mode-style padding, images smaller than the
// window.
type pool3x3Case struct{ ih, iw, s, pt, pl, pb, pr int }

// eachPool3x3Case calls f with each test geometry and an input full of
// ties, signed zeros and NaN, which decide the kept value and where each
// window's gradient goes.
func eachPool3x3Case(r *rand.Rand, f func(tc pool3x3Case, g geom2, src []float32)) {
	for _, tc := range []pool3x3Case{
		{112, 112, 2, 1, 1, 1, 1}, {7, 9, 1, 0, 0, 0, 0}, {8, 8, 2, 0, 0, 1, 1},
		{5, 6, 3, 2, 2, 2, 2}, {2, 2, 1, 1, 1, 1, 1}, {1, 4, 2, 2, 0, 2, 3}, {13, 11, 2, 1, 0, 2, 1},
		{9, 37, 2, 1, 1, 0, 0}, {6, 40, 1, 1, 1, 1, 1},
	} {
		g := geom2{ih: tc.ih, iw: tc.iw, kh: 3, kw: 3, sh: tc.s, sw: tc.s, dh: 1, dw: 1, pt: tc.pt, pl: tc.pl, pb: tc.pb, pr: tc.pr}
		g.oh = (tc.ih+tc.pt+tc.pb-3)/tc.s + 1
		g.ow = (tc.iw+tc.pl+tc.pr-3)/tc.s + 1
		src := make([]float32, tc.ih*tc.iw)
		for i := range src {
			src[i] = float32(r.IntN(7) - 3) // many ties
			switch r.IntN(20) {
			case 0:
				src[i] = float32(math.Copysign(0, -1))
			case 1:
				src[i] = float32(math.NaN())
			}
		}
		f(tc, g, src)
	}
}

// TestMaxPlane3x3MatchesGeneral checks the 3×3 fast path against the
// general window loop (the path that also records indices, which the ONNX
// MaxPool conformance tests check) bit for bit over eachPool3x3Case.
func TestMaxPlane3x3MatchesGeneral(t *testing.T) {
	eachPool3x3Case(rand.New(rand.NewPCG(11, 12)), func(tc pool3x3Case, g geom2, src []float32) {
		want := make([]float32, g.oh*g.ow)
		maxPlane(src, want, make([]int64, g.oh*g.ow), g, 0)
		got := make([]float32, g.oh*g.ow)
		maxPlane(src, got, nil, g, 0)
		for i := range got {
			if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
				t.Fatalf("%+v: output %d = %v, general loop %v", tc, i, got[i], want[i])
			}
		}
	})
}

// TestMeanPlanes checks meanPlanes, four planes side by side, against
// the plain per-plane float64 sum it replaces, bit for bit, for plane
// counts on both sides of a multiple of four and several plane sizes.
func TestMeanPlanes(t *testing.T) {
	rng := rand.New(rand.NewPCG(12, 13))
	for _, hw := range []int{1, 7, 49, 196} {
		for planes := 0; planes <= 9; planes++ {
			src := make([]float32, planes*hw)
			for i := range src {
				src[i] = float32(rng.NormFloat64() * 1e3)
			}
			got := make([]float32, planes)
			meanPlanes(got, src, hw)
			for p := range got {
				var s float64
				for _, v := range src[p*hw : (p+1)*hw] {
					s += float64(v)
				}
				if want := float32(s / float64(hw)); math.Float32bits(got[p]) != math.Float32bits(want) {
					t.Fatalf("hw %d, %d planes: plane %d mean %v, want %v", hw, planes, p, got[p], want)
				}
			}
		}
	}
}
