package engine

import (
	"math"
	"math/rand"
	"testing"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

// TestConvSlabPathMatchesReference runs convolutions large enough for the
// slab-parallel path (with bias, groups, strides and fused activations)
// and compares them with the same operator built on kernel.Naive (the
// textbook triple loop in float64, which takes the whole-matrix im2col
// path) followed by the ONNX definitions of Relu, max(x, 0), and Clip,
// min(max(x, lo), hi).
func TestConvSlabPathMatchesReference(t *testing.T) {
	rng := rand.New(rand.NewSource(3))
	for i, tc := range []struct {
		c, h, w, m, k, stride, pad, group int
	}{
		{5, 37, 41, 16, 3, 1, 1, 1},
		{6, 40, 33, 8, 3, 2, 1, 2},
		{3, 64, 64, 8, 7, 2, 3, 1},
		{8, 40, 40, 4, 1, 2, 0, 1},
	} {
		x := nnRand(rng, 2, tc.c, tc.h, tc.w)
		wt := nnRand(rng, tc.m, tc.c/tc.group, tc.k, tc.k)
		bias := nnRand(rng, tc.m)
		node := nnNode("c", "Conv", []string{"x", "w", "b"}, []string{"y"},
			nnInts("pads", int64(tc.pad), int64(tc.pad), int64(tc.pad), int64(tc.pad)),
			nnInts("strides", int64(tc.stride), int64(tc.stride)),
			&onnx.Attr{Name: "group", Type: onnx.AttrInt, Int: int64(tc.group)})
		fast, err := buildConv(node, &Env{GEMM: defaultGEMM(), Opset: 13, arena: newArena()})
		if err != nil {
			t.Fatal(err)
		}
		ref, err := buildConv(node, &Env{GEMM: kernel.Naive{}, Opset: 13})
		if err != nil {
			t.Fatal(err)
		}
		fc, rc := fast.(*convOp), ref.(*convOp)
		in := []*tensor.Tensor{x, wt, bias}
		s, _ := fc.shape(x, wt)
		if !fc.useSlabs(s.cg*tc.k*tc.k, s.g.oh*s.g.ow) && !s.pointwise() {
			t.Fatalf("case %d: slab path not taken", i)
		}
		want, err := rc.Forward(in)
		if err != nil {
			t.Fatal(err)
		}
		for _, act := range []actKind{actNone, actRelu, actClip} {
			for rep := 0; rep < 2; rep++ { // the second run gets a recycled output buffer
				got, err := fc.forward(in, act, -0.5, 0.75)
				if err != nil {
					t.Fatal(err)
				}
				for j, v := range want[0].F32 {
					switch act {
					case actRelu:
						v = max(v, 0)
					case actClip:
						v = min(max(v, -0.5), 0.75)
					}
					if d := math.Abs(float64(got[0].F32[j] - v)); d > 1e-4*(1+math.Abs(float64(v))) {
						t.Fatalf("case %d act %d: y[%d] = %v, reference %v", i, act, j, got[0].F32[j], v)
					}
				}
				fc.arena.put(got[0].F32)
			}
		}
	}
}
