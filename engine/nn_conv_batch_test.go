package engine

import (
	"math"
	"math/rand"
	"testing"

	"heedmap/tensor"
)

// TestConvBatchPathMatchesReference runs several images with small output
// maps through the batched path (the images' columns side by side) and
// checks them against the operator built on kernel.Naive (the textbook
// product in float64 over a plain im2col) with Relu/Clip as ONNX defines
// them, and bit for bit against the same operator run one image at a time
// (the per-image panel path sums each output in the same order).
func TestConvBatchPathMatchesReference(t *testing.T) {
	rng := rand.New(rand.NewSource(5))
	for i, tc := range []struct {
		n, c, h, w, m, k, stride, pad int
	}{
		{3, 16, 7, 7, 20, 3, 1, 1},
		{4, 8, 14, 14, 12, 3, 2, 1},
		{3, 9, 5, 6, 13, 1, 1, 0},
		{2, 6, 9, 9, 4, 1, 2, 0},
	} {
		x := nnRand(rng, tc.n, tc.c, tc.h, tc.w)
		wt := nnRand(rng, tc.m, tc.c, tc.k, tc.k)
		bias := nnRand(rng, tc.m)
		node := nnNode("c", "Conv", []string{"x", "w", "b"}, []string{"y"},
			nnInts("pads", int64(tc.pad), int64(tc.pad), int64(tc.pad), int64(tc.pad)),
			nnInts("strides", int64(tc.stride), int64(tc.stride)))
		fc, rc := convPair(t, node, newArena())
		s, _ := fc.shape(x, wt)
		if fc.gemm1 == nil || fc.useSlabs(s.cg*tc.k*tc.k, s.g.oh*s.g.ow) {
			t.Fatalf("case %d: batched path not taken", i)
		}
		want, err := rc.Forward([]*tensor.Tensor{x, wt, bias})
		if err != nil {
			t.Fatal(err)
		}
		per := len(x.F32) / tc.n
		for _, act := range []actKind{actNone, actRelu, actClip} {
			got, err := fc.forward([]*tensor.Tensor{x, wt, bias}, act, -0.5, 0.75)
			if err != nil {
				t.Fatal(err)
			}
			outPer := len(got[0].F32) / tc.n
			for b := 0; b < tc.n; b++ {
				one := tensor.FromFloat32(x.F32[b*per:(b+1)*per], append([]int{1}, x.Shape[1:]...)...)
				single, err := fc.forward([]*tensor.Tensor{one, wt, bias}, act, -0.5, 0.75)
				if err != nil {
					t.Fatal(err)
				}
				for j, v := range single[0].F32 {
					if g := got[0].F32[b*outPer+j]; math.Float32bits(g) != math.Float32bits(v) {
						t.Fatalf("case %d act %d image %d: y[%d] = %v batched, %v alone", i, act, b, j, g, v)
					}
				}
			}
			if j, v, ok := matchActivated(got[0].F32, want[0].F32, act); !ok {
				t.Fatalf("case %d act %d: y[%d] = %v, reference %v", i, act, j, got[0].F32[j], v)
			}
		}
	}
}
