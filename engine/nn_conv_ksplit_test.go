package engine

import (
	"math"
	"math/rand"
	"runtime"
	"testing"

	"heedmap/kernel"
	"heedmap/tensor"
)

// TestConvKSplitMatchesReference runs pointwise projections that the
// row-panel path splits by input-channel halves (rowForwardKSplit):
// MobileNetV2's 7×7 and 14×14 shapes, and an odd one (an odd channel
// count, output channels that fill no whole panel, positions that fill
// no whole block of 16). Each is checked with no activation, Relu and
// Clip, with and without a residual, against the direct convolution of
// the ONNX definition (kernel.Naive), and must give the same bits with
// one core as with all of them, and as the middle image of a batch of
// three: the halves depend on the layer's shape only.
func TestConvKSplitMatchesReference(t *testing.T) {
	if !kernel.Supported(kernel.ISAAVX512) {
		t.Skip("the row-panel path runs on AVX-512 only")
	}
	rng := rand.New(rand.NewSource(9))
	for i, tc := range []struct{ c, h, w, m int }{
		{960, 7, 7, 160},
		{576, 14, 14, 96},
		{384, 14, 14, 64},
		{97, 5, 9, 40},
	} {
		x := nnRand(rng, 1, tc.c, tc.h, tc.w)
		wt := nnRand(rng, tc.m, tc.c, 1, 1)
		bias := nnRand(rng, tc.m)
		node := nnNode("c", "Conv", []string{"x", "w", "b"}, []string{"y"})
		fc, rc := convPair(t, node, newArena())
		fc.constW = true
		s, _ := fc.shape(x, wt)
		if !fc.useRows(s) || fc.useSlabs(tc.c, tc.h*tc.w) || !fc.useKSplit(s, tc.c) {
			t.Fatalf("case %d: the input-channel split is not taken", i)
		}
		in := []*tensor.Tensor{x, wt, bias}
		checkForwardEpilogues(t, i, rng, fc, rc, in)

		all, err := fc.Forward(in)
		if err != nil {
			t.Fatal(err)
		}
		prev := runtime.GOMAXPROCS(1)
		one, err := fc.Forward(in)
		runtime.GOMAXPROCS(prev)
		if err != nil {
			t.Fatal(err)
		}
		for j := range all[0].F32 {
			if math.Float32bits(all[0].F32[j]) != math.Float32bits(one[0].F32[j]) {
				t.Fatalf("case %d: y[%d] = %v on %d cores, %v on one", i, j, all[0].F32[j], prev, one[0].F32[j])
			}
		}

		// In a batch of three, the image is computed as alone.
		x3 := nnRand(rng, 3, tc.c, tc.h, tc.w)
		copy(x3.F32[tc.c*tc.h*tc.w:], x.F32)
		three, err := fc.Forward([]*tensor.Tensor{x3, wt, bias})
		if err != nil {
			t.Fatal(err)
		}
		per := tc.m * tc.h * tc.w
		for j, v := range three[0].F32[per : 2*per] {
			if math.Float32bits(v) != math.Float32bits(all[0].F32[j]) {
				t.Fatalf("case %d: y[%d] = %v as image 1 of 3, %v alone", i, j, v, all[0].F32[j])
			}
		}
	}
}
