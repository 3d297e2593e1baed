package engine

import (
	"fmt"
	"math"
	"math/rand"
	"testing"

	"heedmap/tensor"
)

// TestDepthwiseFusedEpilogue runs depthwise Conv (group = C, channel
// multiplier 2, batch 2) with the bias and each fusable activation
// through convOp.forward and compares with the ONNX definitions written
// out in float64: Conv's sum over the receptive field plus B, then Relu
// (max(0, x)) or Clip (min(max, max(min, x))). The shapes take the
// vector kernels (3×3 and 5×5, strides 1 and 2) and the generic loop
// (dilation 2).
func TestDepthwiseFusedEpilogue(t *testing.T) {
	rng := rand.New(rand.NewSource(7))
	const n, c, mult = 2, 3, 2
	for _, tc := range []struct {
		h, w, k, s, d, pad int
	}{
		{9, 17, 3, 1, 1, 1},
		{10, 19, 3, 2, 1, 1},
		{12, 13, 5, 2, 1, 2},
		{8, 11, 5, 1, 1, 2},
		{9, 10, 3, 1, 2, 2},
	} {
		x := nnRand(rng, n, c, tc.h, tc.w)
		w := nnRand(rng, c*mult, 1, tc.k, tc.k)
		b := nnRand(rng, c*mult)
		node := nnNode("c", "Conv", []string{"x", "w", "b"}, []string{"y"},
			nnInt("group", c), nnInts("strides", int64(tc.s), int64(tc.s)),
			nnInts("dilations", int64(tc.d), int64(tc.d)),
			nnInts("pads", int64(tc.pad), int64(tc.pad), int64(tc.pad), int64(tc.pad)))
		built, err := buildConv(node, &Env{GEMM: defaultGEMM(), Opset: 13})
		if err != nil {
			t.Fatal(err)
		}
		op := built.(*convOp)
		span := (tc.k-1)*tc.d + 1
		oh := (tc.h+2*tc.pad-span)/tc.s + 1
		ow := (tc.w+2*tc.pad-span)/tc.s + 1
		conv := make([]float64, n*c*mult*oh*ow)
		for i := range conv {
			bi, m, r, q := i/(c*mult*oh*ow), i/(oh*ow)%(c*mult), i/ow%oh, i%ow
			ch := m / mult
			s := float64(b.F32[m])
			for kh := 0; kh < tc.k; kh++ {
				for kw := 0; kw < tc.k; kw++ {
					ih, iw := r*tc.s-tc.pad+kh*tc.d, q*tc.s-tc.pad+kw*tc.d
					if ih >= 0 && ih < tc.h && iw >= 0 && iw < tc.w {
						s += float64(x.F32[((bi*c+ch)*tc.h+ih)*tc.w+iw]) * float64(w.F32[(m*tc.k+kh)*tc.k+kw])
					}
				}
			}
			conv[i] = s
		}
		for _, a := range []struct {
			name   string
			act    actKind
			lo, hi float32
			f      func(float64) float64
		}{
			{"none", actNone, 0, 0, func(v float64) float64 { return v }},
			{"relu", actRelu, 0, 0, func(v float64) float64 { return math.Max(0, v) }},
			{"clip", actClip, -0.3, 0.4, func(v float64) float64 { return math.Min(0.4, math.Max(-0.3, v)) }},
		} {
			out, err := op.forward([]*tensor.Tensor{x, w, b}, a.act, a.lo, a.hi)
			if err != nil {
				t.Fatal(err)
			}
			if got, want := fmt.Sprint(out[0].Shape), fmt.Sprint([]int{n, c * mult, oh, ow}); got != want {
				t.Fatalf("%+v %s: shape %s, want %s", tc, a.name, got, want)
			}
			for i, v := range out[0].F32 {
				want := a.f(conv[i])
				if math.Abs(float64(v)-want) > 1e-5+1e-5*math.Abs(want) {
					t.Fatalf("%+v %s: y[%d] = %v, want %v", tc, a.name, i, v, want)
				}
			}
		}
	}
}

// TestDepthwiseKernelEpilogue checks the translation of the engine's
// epilogue into the kernel's clamp bounds.
func TestDepthwiseKernelEpilogue(t *testing.T) {
	inf := float32(math.Inf(1))
	for _, tc := range []struct {
		ep     *epilogue
		lo, hi float32
	}{
		{nil, -inf, inf},
		{&epilogue{act: actNone}, -inf, inf},
		{&epilogue{act: actRelu}, 0, inf},
		{&epilogue{act: actClip, lo: -1, hi: 6}, -1, 6},
	} {
		k := kernelEpilogue(tc.ep)
		if k.Lo != tc.lo || k.Hi != tc.hi {
			t.Errorf("%+v: bounds [%v, %v], want [%v, %v]", tc.ep, k.Lo, k.Hi, tc.lo, tc.hi)
		}
	}
}
