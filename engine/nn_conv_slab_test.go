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
		fc, rc := convPair(t, node, newArena())
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
				if j, v, ok := matchActivated(got[0].F32, want[0].F32, act); !ok {
					t.Fatalf("case %d act %d: y[%d] = %v, reference %v", i, act, j, got[0].F32[j], v)
				}
				fc.arena.put(got[0].F32)
			}
		}
	}
}

// TestConvTransposedBackwardMatchesReference checks the input gradient of
// unit-stride convolutions through the transposed paths (slabs for large
// maps, the batched product for several images with small ones)
// against the adjoint identity ⟨conv(x), dy⟩ = ⟨x, dx⟩ (without bias the
// convolution is linear in x) and against the operator built on
// kernel.Naive, which takes the Wᵀ·dY + col2im path.
func TestConvTransposedBackwardMatchesReference(t *testing.T) {
	rng := rand.New(rand.NewSource(4))
	for i, tc := range []struct {
		c, h, w, m, k, pad, group int
	}{
		{5, 37, 41, 16, 3, 1, 1},
		{6, 33, 40, 8, 3, 1, 2},
		{4, 30, 30, 6, 5, 2, 1},
		{3, 32, 32, 4, 3, 0, 1},
		// small maps, several images: the batched transposed product
		{16, 7, 7, 20, 3, 1, 1},
		{8, 14, 14, 12, 3, 1, 1},
		{9, 6, 5, 13, 1, 0, 1},
	} {
		x := nnRand(rng, 2, tc.c, tc.h, tc.w)
		wt := nnRand(rng, tc.m, tc.c/tc.group, tc.k, tc.k)
		node := nnNode("c", "Conv", []string{"x", "w"}, []string{"y"},
			nnInts("pads", int64(tc.pad), int64(tc.pad), int64(tc.pad), int64(tc.pad)),
			&onnx.Attr{Name: "group", Type: onnx.AttrInt, Int: int64(tc.group)})
		fc, ref := convPair(t, node, nil)
		s, _ := fc.shape(x, wt)
		if _, ok := transposedGeom(s.g); !ok {
			t.Fatalf("case %d: transposed path not taken", i)
		}
		checkBackwardX(t, i, rng, fc, ref, []*tensor.Tensor{x, wt}, nil)
	}
}

// TestConvBandedBackwardMatchesReference checks the input gradient of
// large strided convolutions, formed band by band of output rows
// (bandedInputGrad, taken with the graph's memo of Wᵀ), against the
// operator built on kernel.Naive and the adjoint identity, as above.
func TestConvBandedBackwardMatchesReference(t *testing.T) {
	rng := rand.New(rand.NewSource(5))
	memo := func(i, n int, build func([]float32)) []float32 {
		if i != 1 {
			return nil
		}
		f := make([]float32, n)
		build(f)
		return f
	}
	for i, tc := range []struct {
		c, h, w, m, k, stride, pad, group int
	}{
		{3, 112, 112, 16, 7, 2, 3, 1}, // a first layer: 3 bands of rows two apart overlap
		{40, 56, 57, 8, 3, 2, 1, 1},
		{48, 80, 80, 8, 3, 2, 1, 2},
		{3, 181, 178, 4, 5, 3, 2, 1},
	} {
		x := nnRand(rng, 2, tc.c, tc.h, tc.w)
		wt := nnRand(rng, tc.m, tc.c/tc.group, tc.k, tc.k)
		p, st := int64(tc.pad), int64(tc.stride)
		node := nnNode("c", "Conv", []string{"x", "w"}, []string{"y"},
			nnInts("pads", p, p, p, p), nnInts("strides", st, st),
			&onnx.Attr{Name: "group", Type: onnx.AttrInt, Int: int64(tc.group)})
		fc, ref := convPair(t, node, nil)
		s, _ := fc.shape(x, wt)
		if kk := s.cg * s.g.kh * s.g.kw; kk*s.g.oh*s.g.ow < bandedMin {
			t.Fatalf("case %d: %d×%d column matrix, below the banded path's %d", i, kk, s.g.oh*s.g.ow, bandedMin)
		}
		checkBackwardX(t, i, rng, fc, ref, []*tensor.Tensor{x, wt}, memo)
	}
}

// checkBackwardX runs the bias-free convolution in = {x, w} forward on
// the reference operator, back-propagates a random output gradient through
// fc (with memo, nil for none) and checks the input gradient with
// checkInputGradient.
func checkBackwardX(t *testing.T, i int, rng *rand.Rand, fc, ref *convOp, in []*tensor.Tensor, memo memoFunc) {
	t.Helper()
	y, err := ref.Forward(in)
	if err != nil {
		t.Fatal(err)
	}
	dy := nnRand(rng, y[0].Shape...)
	got, err := fc.backwardFor(in, y, []*tensor.Tensor{dy}, []bool{true, false}, memo)
	if err != nil {
		t.Fatal(err)
	}
	checkInputGradient(t, i, ref, in, y[0], dy, got[0])
}

// checkInputGradient compares the input gradient got of a bias-free
// convolution y = conv(x), in = {x, w}, for output gradient dy with the
// reference operator's (within 1e-4 relative), and checks the adjoint
// identity ⟨conv(x), dy⟩ = ⟨x, dx⟩, which holds because the convolution
// is linear in x.
func checkInputGradient(t *testing.T, i int, ref *convOp, in []*tensor.Tensor, y, dy, got *tensor.Tensor) {
	t.Helper()
	w, err := ref.BackwardFor(in, []*tensor.Tensor{y}, []*tensor.Tensor{dy}, []bool{true, false})
	if err != nil {
		t.Fatal(err)
	}
	x, want := in[0], w[0]
	var yy, xx float64
	for j, v := range y.F32 {
		yy += float64(v) * float64(dy.F32[j])
	}
	for j, v := range got.F32 {
		xx += float64(v) * float64(x.F32[j])
		if d := math.Abs(float64(v - want.F32[j])); d > 1e-4*(1+math.Abs(float64(want.F32[j]))) {
			t.Fatalf("case %d: dx[%d] = %v, reference %v", i, j, v, want.F32[j])
		}
	}
	if math.Abs(yy-xx) > 1e-4*(1+math.Abs(yy)) {
		t.Fatalf("case %d: <conv(x),dy> = %g but <x,dx> = %g", i, yy, xx)
	}
}

// convPair builds node twice: on the default GEMM with arena (nil for
// none), the path under test, and on kernel.Naive (the textbook product in
// float64 over a plain im2col), the reference.
func convPair(t *testing.T, node *onnx.Node, a *arena) (fast, ref *convOp) {
	t.Helper()
	f, err := buildConv(node, &Env{GEMM: defaultGEMM(), Opset: 13, arena: a})
	if err != nil {
		t.Fatal(err)
	}
	r, err := buildConv(node, &Env{GEMM: kernel.Naive{}, Opset: 13})
	if err != nil {
		t.Fatal(err)
	}
	return f.(*convOp), r.(*convOp)
}

// matchActivated compares got with the reference convolution want followed
// by act as ONNX defines it (Relu max(x, 0), Clip min(max(x, −0.5), 0.75)),
// within 1e-4 relative; it returns the first mismatch and the expected
// value there.
func matchActivated(got, want []float32, act actKind) (int, float32, bool) {
	for j, v := range want {
		switch act {
		case actRelu:
			v = max(v, 0)
		case actClip:
			v = min(max(v, -0.5), 0.75)
		}
		if d := math.Abs(float64(got[j] - v)); d > 1e-4*(1+math.Abs(float64(v))) {
			return j, v, false
		}
	}
	return 0, 0, true
}

// checkForwardEpilogues runs fc's forward with every fused activation,
// with and without a random residual, against the reference operator rc's
// output followed by the ONNX definitions of Add, Relu and Clip
// (matchActivated), for case i.
func checkForwardEpilogues(t *testing.T, i int, rng *rand.Rand, fc, rc *convOp, in []*tensor.Tensor) {
	t.Helper()
	want, err := rc.Forward(in)
	if err != nil {
		t.Fatal(err)
	}
	res := nnRand(rng, want[0].Shape...)
	for _, act := range []actKind{actNone, actRelu, actClip} {
		for _, withRes := range []bool{false, true} {
			var r []float32
			ref := want[0].F32
			if withRes {
				r = res.F32
				ref = make([]float32, len(ref))
				for j, v := range want[0].F32 {
					ref[j] = v + r[j]
				}
			}
			got, err := fc.forwardEp(in, r, act, -0.5, 0.75)
			if err != nil {
				t.Fatal(err)
			}
			if j, v, ok := matchActivated(got[0].F32, ref, act); !ok {
				t.Fatalf("case %d act %d residual %v: y[%d] = %v, reference %v", i, act, withRes, j, got[0].F32[j], v)
			}
			fc.arena.put(got[0].F32)
		}
	}
}
