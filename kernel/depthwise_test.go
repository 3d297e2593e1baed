package kernel_test

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestDepthwiseBackwardIsAdjoint checks DepthwiseBackward against the
// definition of the adjoint: the convolution y = x ⊛ w is linear in x and
// in w, so for any dy, ⟨y, dy⟩ = ⟨x, dx⟩ = ⟨w, dw⟩ where dx and dw are the
// adjoint maps applied to dy. The forward side is checked against the
// ONNX Conv definition by TestDepthwiseMatchesDirectConv.
func TestDepthwiseBackwardIsAdjoint(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 22))
	for i, tc := range dwBaseCases {
		p, g, oh, ow, m := tc.plan(t)
		x := randSlice(r, tc.c*tc.h*tc.w)
		w := randSlice(r, m*g.KH*g.KW)
		dy := randSlice(r, m*oh*ow)
		y := make([]float32, m*oh*ow)
		if err := p.Depthwise(y, x, w, tc.mult); err != nil {
			t.Fatal(err)
		}
		dx := make([]float32, len(x))
		dw := make([]float32, len(w))
		// Two halves of the channels, to exercise the range arguments.
		for _, rg := range [][2]int{{0, tc.c / 2}, {tc.c / 2, tc.c}} {
			if err := p.DepthwiseBackward(dx, dw, dy, x, w, tc.mult, rg[0], rg[1]); err != nil {
				t.Fatal(err)
			}
		}
		dot := func(a, b []float32) float64 {
			var s float64
			for j := range a {
				s += float64(a[j]) * float64(b[j])
			}
			return s
		}
		yy, xx, ww := dot(y, dy), dot(x, dx), dot(w, dw)
		if math.Abs(yy-xx) > 1e-4*(1+math.Abs(yy)) || math.Abs(yy-ww) > 1e-4*(1+math.Abs(yy)) {
			t.Fatalf("case %d: <y,dy>=%g <x,dx>=%g <w,dw>=%g", i, yy, xx, ww)
		}
		// Only dx: x is not read.
		dx2 := make([]float32, len(x))
		if err := p.DepthwiseBackward(dx2, nil, dy, nil, w, tc.mult, 0, tc.c); err != nil {
			t.Fatal(err)
		}
		if err := closeTo(dx2, dx, 1e-6, 1e-6); err != nil {
			t.Fatalf("case %d, dx only: %v", i, err)
		}
	}
}
