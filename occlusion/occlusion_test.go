package occlusion

import (
	"context"
	"math"
	"strings"
	"testing"

	"heedmap/explain"
	"heedmap/explain/explaintest"
	"heedmap/tensor"
)

var ctx = context.Background()

func TestOrigins(t *testing.T) {
	for _, c := range []struct {
		n, p, s int
		want    []int
	}{
		{10, 4, 2, []int{0, 2, 4, 6}},
		{11, 4, 2, []int{0, 2, 4, 6, 7}}, // one flush with the far edge
		{224, 16, 8, nil},
		{5, 8, 2, []int{0}},
		{8, 8, 3, []int{0}},
	} {
		got := Origins(c.n, c.p, c.s)
		if c.want == nil {
			if len(got) != 27 || got[26] != 208 {
				t.Errorf("Origins(224,16,8) = %v", got)
			}
			continue
		}
		if len(got) != len(c.want) {
			t.Errorf("Origins(%d,%d,%d) = %v, want %v", c.n, c.p, c.s, got, c.want)
			continue
		}
		for i := range got {
			if got[i] != c.want[i] {
				t.Errorf("Origins(%d,%d,%d) = %v, want %v", c.n, c.p, c.s, got, c.want)
			}
		}
	}
	o := Occlusion{}
	if p, s := o.Geometry(224, 224); p != 16 || s != 8 {
		t.Errorf("default geometry at 224: %d, %d", p, s)
	}
	if p, s := o.Geometry(448, 300); p != 21 || s != 11 {
		t.Errorf("default geometry at 300: %d, %d", p, s)
	}
}

// Zeiler & Fergus 2014 §4.2, on a linear model: occluding window w changes
// the score by Σ_{j∈w} W_j (x_j − fill_j) exactly, so the map at p is the
// mean of those window sums over the windows covering p, computed here by
// brute force from the weights.
func TestOcclusionLinear(t *testing.T) {
	const c, h, w = 3, 13, 11
	net := explaintest.NewLinear(c, h, w, 4, 61)
	x := explaintest.RandomInput(c, h, w, 62)
	norm := explain.Normalization{Mean: [3]float32{0.5, 0.4, 0.3}, Std: [3]float32{0.2, 0.25, 0.3}}
	for _, fill := range []FillKind{FillModelZero, FillImageMean, FillBlack, FillColor, FillBlur} {
		o := Occlusion{Patch: 4, Stride: 3, Fill: fill, Color: [3]float32{0.9, 0.1, 0.2}, Norm: norm, BatchSize: 5}
		r, err := o.Attribute(ctx, net, x, explain.Class(2, explain.Logit))
		if err != nil {
			t.Fatal(err)
		}
		f, _ := o.FillInput(x)
		if fill == FillColor {
			for k := 0; k < 3; k++ {
				want := (o.Color[k] - norm.Mean[k]) / norm.Std[k]
				if math.Abs(float64(f.F32[k*h*w+7]-want)) > 1e-6 {
					t.Errorf("colour fill channel %d = %v, want %v", k, f.F32[k*h*w+7], want)
				}
			}
		}
		d := c * h * w
		sum := make([]float64, h*w)
		cnt := make([]float64, h*w)
		for _, y0 := range []int{0, 3, 6, 9} {
			for _, x0 := range []int{0, 3, 6, 7} {
				var delta float64
				for k := 0; k < c; k++ {
					for y := y0; y < y0+4; y++ {
						for xx := x0; xx < x0+4; xx++ {
							i := k*h*w + y*w + xx
							delta += float64(net.W[2*d+i]) * (float64(x.F32[i]) - float64(f.F32[i]))
						}
					}
				}
				for y := y0; y < y0+4; y++ {
					for xx := x0; xx < x0+4; xx++ {
						sum[y*w+xx] += delta
						cnt[y*w+xx]++
					}
				}
			}
		}
		for p := range sum {
			want := sum[p] / cnt[p]
			if math.Abs(float64(r.Map.Data[p])-want) > 1e-4*math.Max(1, math.Abs(want)) {
				t.Fatalf("%v: pixel %d: %v, want %v", fill, p, r.Map.Data[p], want)
			}
		}
		if len(r.Warnings) != 0 {
			t.Errorf("%v: unexpected warnings %v", fill, r.Warnings)
		}
	}
}

// A patch covering the whole image: every pixel gets score(x) − score(fill).
// Without normalisation the default fill is black and a warning is returned.
func TestOcclusionWholeImage(t *testing.T) {
	net := explaintest.NewMLP(3, 6, 6, 12, 3, 71)
	x := explaintest.RandomInput(3, 6, 6, 72)
	r, err := Occlusion{Patch: 6}.Attribute(ctx, net, x, explain.Predicted(explain.Softmax))
	if err != nil {
		t.Fatal(err)
	}
	lx, _ := explain.Logits(ctx, net, x)
	lf, _ := explain.Logits(ctx, net, tensor.New(1, 3, 6, 6)) // model zero = black here
	want := r.Target.Eval(lx, nil) - r.Target.Eval(lf, nil)
	for i, v := range r.Map.Data {
		if math.Abs(float64(v)-want) > 1e-6 {
			t.Fatalf("pixel %d: %v, want %v", i, v, want)
		}
	}
	if len(r.Warnings) != 1 || !strings.Contains(r.Warnings[0], "black") {
		t.Errorf("warnings %v", r.Warnings)
	}
}
