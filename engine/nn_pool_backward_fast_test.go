package engine

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestMaxPlaneBackward3x3MatchesGeneral checks the 3×3 fast path of the
// max-pool input gradient against the general loop (maxRow with indices,
// the path the ONNX MaxPool conformance tests check through Indices) bit
// for bit, over the shapes of TestMaxPlane3x3MatchesGeneral: strides,
// asymmetric padding, images smaller than the window, ties, signed zeros
// and NaN, which decide where each window's gradient goes.
func TestMaxPlaneBackward3x3MatchesGeneral(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 22))
	for _, tc := range []struct{ ih, iw, s, pt, pl, pb, pr int }{
		{112, 112, 2, 1, 1, 1, 1}, {7, 9, 1, 0, 0, 0, 0}, {8, 8, 2, 0, 0, 1, 1},
		{5, 6, 3, 2, 2, 2, 2}, {2, 2, 1, 1, 1, 1, 1}, {1, 4, 2, 2, 0, 2, 3}, {13, 11, 2, 1, 0, 2, 1},
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
		dy := make([]float32, g.oh*g.ow)
		for i := range dy {
			dy[i] = float32(r.NormFloat64())
		}
		// The general loop: each window's index from maxRow, gradient
		// added there.
		want := make([]float32, len(src))
		val, idx := make([]float32, g.ow), make([]int64, g.ow)
		for oy := 0; oy < g.oh; oy++ {
			maxRow(src, val, idx, g, 0, oy, 0, g.ow)
			for ox, a := range idx {
				want[a] += dy[oy*g.ow+ox]
			}
		}
		got := make([]float32, len(src))
		maxPlaneBackward(src, dy, got, g)
		for i := range got {
			if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
				t.Fatalf("%+v: dx[%d] = %v, general loop %v", tc, i, got[i], want[i])
			}
		}
	}
}
