package explain_test

import (
	"bytes"
	"math"
	"testing"

	"heedmap/explain"
	"heedmap/explain/explaintest"
	"heedmap/occlusion"
	"heedmap/tensor"
)

// The linear-model checks through the runtime itself: an ONNX
// Flatten + Gemm on the NCHW input (weights chosen here), so the score of
// class k is F(x) = w_k·x + b_k. Then
//   - gradient = w_k exactly (Simonyan et al. 2014, §3.1: the saliency of a
//     linear score is its weight vector);
//   - integrated gradients = (x − x′) ⊙ w_k and completeness
//     Σ IG = F(x) − F(x′) holds (Sundararajan et al. 2017, eq. 1 with a
//     constant gradient), for the black and the noise baseline;
//   - occlusion at p = mean over covering windows w of Σ_{j∈w} w_kj (x_j −
//     fill_j) (Zeiler & Fergus 2014, definition of the map);
//   - SmoothGrad with σ = 0 is the gradient (Smilkov et al. 2017, eq. 3).
func TestLinearGemmOnRuntime(t *testing.T) {
	const c, h, w, k = 3, 9, 7, 3
	d := c * h * w
	lin := explaintest.NewLinear(c, h, w, k, 111)
	for i := range lin.W {
		lin.W[i] *= 0.25
	}
	W := tensor.FromFloat32(append([]float32(nil), lin.W...), k, d)
	B := tensor.FromFloat32(append([]float32(nil), lin.B...), k)
	net, err := explain.FromGraph(gemmGraph(t, []int64{c, h, w}, W, B), explain.GraphOptions{})
	if err != nil {
		t.Fatal(err)
	}
	x := explaintest.RandomInput(c, h, w, 112)
	const cls = 2
	row := W.F32[cls*d : (cls+1)*d]
	score := func(v []float32) float64 {
		s := float64(B.F32[cls])
		for i := range v {
			s += float64(row[i]) * float64(v[i])
		}
		return s
	}
	tg := explain.Class(cls, explain.Logit)

	g, err := explain.Gradient{}.Attribute(ctx, net, x, tg)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(f32bytes(g.Channels.F32), f32bytes(row)) {
		t.Errorf("gradient is not the weight row exactly (relative error %.2e)", relErr(g.Channels.F32, row))
	}
	if math.Abs(g.Score-score(x.F32)) > 1e-5 {
		t.Errorf("score %v, want %v", g.Score, score(x.F32))
	}

	norm := explain.Normalization{Mean: [3]float32{0.485, 0.456, 0.406}, Std: [3]float32{0.229, 0.224, 0.225}} // ImageNet statistics, common practice
	for _, bk := range []explain.BaselineKind{explain.BaselineBlack, explain.BaselineNoise} {
		ig := explain.IntegratedGradients{Steps: 5, Baseline: bk, Norm: norm, Seed: 4, BatchSize: 2}
		r, err := ig.Attribute(ctx, net, x, tg)
		if err != nil {
			t.Fatal(err)
		}
		base, _ := ig.BaselineInput(x)
		var sum float64
		for i := range x.F32 {
			want := (float64(x.F32[i]) - float64(base.F32[i])) * float64(row[i])
			if math.Abs(float64(r.Channels.F32[i])-want) > 1e-5*math.Max(1, math.Abs(want)) {
				t.Fatalf("%v: IG[%d] = %v, want %v", bk, i, r.Channels.F32[i], want)
			}
			sum += float64(r.Channels.F32[i])
		}
		if diff := score(x.F32) - score(base.F32); math.Abs(sum-diff) > 1e-4*math.Abs(diff) || r.Gap > 1e-4 {
			t.Errorf("%v: Σ IG = %v, F(x) − F(x′) = %v, reported gap %g", bk, sum, diff, r.Gap)
		}
	}

	o := occlusion.Occlusion{Patch: 3, Stride: 2, Fill: occlusion.FillImageMean, BatchSize: 4}
	r, err := o.Attribute(ctx, net, x, tg)
	if err != nil {
		t.Fatal(err)
	}
	fill, _ := o.FillInput(x)
	sum := make([]float64, h*w)
	cnt := make([]float64, h*w)
	for _, y0 := range []int{0, 2, 4, 6} { // 9 rows: 0, 2, 4, 6 (6+3 = 9 flush)
		for _, x0 := range []int{0, 2, 4} { // 7 columns: 0, 2, 4 (4+3 = 7 flush)
			var delta float64
			for ch := 0; ch < c; ch++ {
				for y := y0; y < y0+3; y++ {
					for xx := x0; xx < x0+3; xx++ {
						i := (ch*h+y)*w + xx
						delta += float64(row[i]) * (float64(x.F32[i]) - float64(fill.F32[i]))
					}
				}
			}
			for y := y0; y < y0+3; y++ {
				for xx := x0; xx < x0+3; xx++ {
					sum[y*w+xx] += delta
					cnt[y*w+xx]++
				}
			}
		}
	}
	for p := range sum {
		if want := sum[p] / cnt[p]; math.Abs(float64(r.Map.Data[p])-want) > 1e-4*math.Max(1, math.Abs(want)) {
			t.Fatalf("occlusion pixel %d: %v, want %v", p, r.Map.Data[p], want)
		}
	}

	s, err := explain.SmoothGrad{Samples: 3, Sigma: -1}.Attribute(ctx, net, x, tg)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(f32bytes(s.Channels.F32), f32bytes(g.Channels.F32)) {
		t.Error("SmoothGrad with σ = 0 differs from the gradient")
	}
}

// A model whose graph ends in Softmax: GraphOptions.Output may name the
// inner pre-softmax tensor, and the methods then see the logits (gradient of
// the logit = weight row, exactly), not probabilities.
func TestInnerLogitsOutput(t *testing.T) {
	const c, h, w, k = 1, 3, 4, 3
	lin := explaintest.NewLinear(c, h, w, k, 121)
	W := tensor.FromFloat32(append([]float32(nil), lin.W...), k, c*h*w)
	B := tensor.FromFloat32(append([]float32(nil), lin.B...), k)
	g := gemmGraph(t, []int64{c, h, w}, W, B, true)
	x := explaintest.RandomInput(c, h, w, 122)
	probs, err := explain.FromGraph(g, explain.GraphOptions{})
	if err != nil {
		t.Fatal(err)
	}
	p, _ := explain.Logits(ctx, probs, x)
	var sum float64
	for _, v := range p {
		sum += float64(v)
	}
	if math.Abs(sum-1) > 1e-6 {
		t.Fatalf("default output is not the softmax: sums to %v", sum)
	}
	net, err := explain.FromGraph(g, explain.GraphOptions{Output: "logits"})
	if err != nil {
		t.Fatal(err)
	}
	r, err := explain.Gradient{}.Attribute(ctx, net, x, explain.Class(1, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(f32bytes(r.Channels.F32), f32bytes(W.F32[c*h*w:2*c*h*w])) {
		t.Error("gradient of the inner logit is not the weight row")
	}
	l, _ := explain.Logits(ctx, net, x)
	for j := range l {
		if math.Abs(math.Exp(float64(l[j]))/expSum(l)-float64(p[j])) > 1e-6 {
			t.Errorf("softmax of inner logits %v ≠ graph output %v", l, p)
		}
	}
}

func expSum(v []float32) float64 {
	var s float64
	for _, x := range v {
		s += math.Exp(float64(x))
	}
	return s
}
