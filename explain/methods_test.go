package explain_test

import (
	"bytes"
	"context"
	"encoding/binary"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"heedmap/explain"
	"heedmap/explain/explaintest"
	"heedmap/tensor"
)

var ctx = context.Background()

func closeTo(a, b, tol float64) bool {
	return math.Abs(a-b) <= tol*math.Max(1, math.Max(math.Abs(a), math.Abs(b)))
}

// Simonyan et al. 2014 (§3.1): for a linear score S_c = w_cᵀx + b_c the
// saliency is w_c itself; the map is max_c |w| over channels.
func TestGradientLinear(t *testing.T) {
	net := explaintest.NewLinear(3, 5, 4, 6, 1)
	x := explaintest.RandomInput(3, 5, 4, 2)
	r, err := explain.Gradient{}.Attribute(ctx, net, x, explain.Class(2, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	d := 3 * 5 * 4
	for i, g := range r.Channels.F32 {
		if g != net.W[2*d+i] {
			t.Fatalf("gradient[%d] = %v, want weight %v exactly", i, g, net.W[2*d+i])
		}
	}
	for p := 0; p < 20; p++ {
		var mx, sum float64
		for c := 0; c < 3; c++ {
			w := float64(net.W[2*d+c*20+p])
			mx = math.Max(mx, math.Abs(w))
			sum += w
		}
		if !closeTo(float64(r.Map.Data[p]), mx, 1e-7) || !closeTo(float64(r.Signed.Data[p]), sum, 1e-6) {
			t.Errorf("pixel %d: map %v signed %v, want %v %v", p, r.Map.Data[p], r.Signed.Data[p], mx, sum)
		}
	}
}

// Shrikumar et al. 2016: gradient ⊙ input; for a linear model it is each
// input's term w_i·x_i of the score.
func TestGradientTimesInputLinear(t *testing.T) {
	net := explaintest.NewLinear(3, 4, 4, 3, 3)
	x := explaintest.RandomInput(3, 4, 4, 4)
	r, err := explain.GradientTimesInput{}.Attribute(ctx, net, x, explain.Class(1, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	d := 48
	for i := range x.F32 {
		want := float64(net.W[d+i]) * float64(x.F32[i])
		if !closeTo(float64(r.Channels.F32[i]), want, 1e-6) {
			t.Fatalf("g×x[%d] = %v, want %v", i, r.Channels.F32[i], want)
		}
	}
}

// Sundararajan et al. 2017: for a linear F the gradient is constant along
// the path, so IG_i = (x_i − x′_i)·w_i, and completeness Σ IG = F(x) − F(x′)
// holds up to rounding, for any quadrature and any baseline.
func TestIGLinear(t *testing.T) {
	net := explaintest.NewLinear(3, 6, 5, 4, 5)
	x := explaintest.RandomInput(3, 6, 5, 6)
	norm := explain.Normalization{Mean: [3]float32{0.485, 0.456, 0.406}, Std: [3]float32{0.229, 0.224, 0.225}} // ImageNet statistics, common practice
	for _, q := range []explain.Quadrature{explain.Midpoint, explain.GaussLegendre} {
		for _, bk := range []explain.BaselineKind{explain.BaselineBlack, explain.BaselineMean, explain.BaselineBlur, explain.BaselineNoise} {
			ig := explain.IntegratedGradients{Steps: 7, Quadrature: q, Baseline: bk, Norm: norm, Seed: 9, BatchSize: 3}
			r, err := ig.Attribute(ctx, net, x, explain.Class(3, explain.Logit))
			if err != nil {
				t.Fatal(err)
			}
			base, _ := ig.BaselineInput(x)
			if bk == explain.BaselineBlack {
				for c := 0; c < 3; c++ {
					if want := -norm.Mean[c] / norm.Std[c]; !closeTo(float64(base.F32[c*30]), float64(want), 1e-6) {
						t.Errorf("black baseline channel %d = %v, want (0−mean)/std = %v", c, base.F32[c*30], want)
					}
				}
			}
			d := 90
			for i := range x.F32 {
				want := (float64(x.F32[i]) - float64(base.F32[i])) * float64(net.W[3*d+i])
				if !closeTo(float64(r.Channels.F32[i]), want, 1e-5) {
					t.Fatalf("%v/%v: IG[%d] = %v, want %v", q, bk, i, r.Channels.F32[i], want)
				}
			}
			if r.Gap > 1e-5 {
				t.Errorf("%v/%v: completeness gap %g on a linear model", q, bk, r.Gap)
			}
		}
	}
}

// Completeness (Sundararajan et al. 2017) is only approached by the
// quadrature: on a ReLU MLP (whose gradient is piecewise constant along the
// path) the gap must fall as the midpoint rule takes 8, 32, 128 steps.
func TestIGCompletenessConverges(t *testing.T) {
	net := explaintest.NewMLP(2, 4, 4, 24, 3, 11)
	x := explaintest.RandomInput(2, 4, 4, 12)
	for _, kind := range []explain.ScoreKind{explain.Logit, explain.Softmax} {
		var gaps []float64
		for _, m := range []int{8, 32, 128} {
			r, err := explain.IntegratedGradients{Steps: m}.Attribute(ctx, net, x, explain.Class(0, kind))
			if err != nil {
				t.Fatal(err)
			}
			gaps = append(gaps, r.Gap)
		}
		t.Logf("%v: gaps %.2e", kind, gaps)
		if !(gaps[0] > gaps[1] && gaps[1] > gaps[2]) || gaps[2] > 0.01 {
			t.Errorf("%v: completeness gaps %v do not fall to < 1%%", kind, gaps)
		}
	}
}

// Gauss–Legendre nodes and weights on [−1, 1] against the closed forms of
// the 3- and 5-point rules (A&S Table 25.4: ±√(3/5), weights 5/9, 8/9; five
// points ±⅓√(5 ∓ 2√(10/7)), weights (322 ± 13√70)/900), the 4-point values of
// Table 25.4 (x = 0.339981043584856, 0.861136311594053; w = 0.652145154862546,
// 0.347854845137454), and exactness for polynomials of degree 2m−1.
func TestLegendreNodes(t *testing.T) {
	check := func(m int, wantX, wantW []float64) {
		t.Helper()
		x, w := explain.LegendreNodes(m)
		for i := range wantX {
			if math.Abs(x[i]-wantX[i]) > 1e-14 || math.Abs(w[i]-wantW[i]) > 1e-14 {
				t.Errorf("m=%d node %d: (%v, %v), want (%v, %v)", m, i, x[i], w[i], wantX[i], wantW[i])
			}
		}
	}
	r35 := math.Sqrt(3. / 5)
	check(3, []float64{-r35, 0, r35}, []float64{5. / 9, 8. / 9, 5. / 9})
	check(4, []float64{-0.861136311594053, -0.339981043584856, 0.339981043584856, 0.861136311594053},
		[]float64{0.347854845137454, 0.652145154862546, 0.652145154862546, 0.347854845137454})
	a, b := math.Sqrt(5-2*math.Sqrt(10./7))/3, math.Sqrt(5+2*math.Sqrt(10./7))/3
	wa, wb := (322+13*math.Sqrt(70))/900, (322-13*math.Sqrt(70))/900
	check(5, []float64{-b, -a, 0, a, b}, []float64{wb, wa, 128. / 225, wa, wb})
	for _, m := range []int{1, 2, 7, 16, 64, 128} {
		alpha, weight, err := explain.GaussLegendre.Nodes(m)
		if err != nil {
			t.Fatal(err)
		}
		for deg := 0; deg <= 2*m-1 && deg <= 40; deg++ {
			var s float64
			for k := range alpha {
				s += weight[k] * math.Pow(alpha[k], float64(deg))
			}
			if want := 1 / float64(deg+1); math.Abs(s-want) > 1e-12 {
				t.Errorf("m=%d: ∫₀¹ α^%d = %v, want %v", m, deg, s, want)
			}
		}
	}
}

// The seed ∂score/∂logits against central finite differences of the score
// (the definition of the derivative), for softmax and sigmoid group scores.
func TestScoreSeed(t *testing.T) {
	z := []float32{0.3, -1.2, 2.0, 0.7, -0.1}
	for _, kind := range []explain.ScoreKind{explain.Logit, explain.Softmax, explain.Sigmoid} {
		tg := explain.Target{Classes: []int{1, 3}, Score: kind}
		g := make([]float32, len(z))
		tg.Eval(z, g)
		for j := range z {
			const h = 1e-3
			zp, zm := append([]float32(nil), z...), append([]float32(nil), z...)
			zp[j] += h
			zm[j] -= h
			fd := (tg.Eval(zp, nil) - tg.Eval(zm, nil)) / (2 * h)
			if math.Abs(fd-float64(g[j])) > 1e-4 {
				t.Errorf("%v: ∂S/∂z_%d = %v, finite difference %v", kind, j, g[j], fd)
			}
		}
	}
	// A softmax group of every class scores 1.
	all := explain.Target{Classes: []int{0, 1, 2, 3, 4}, Score: explain.Softmax}
	if s := all.Eval(z, nil); math.Abs(s-1) > 1e-12 {
		t.Errorf("softmax over all classes sums to %v", s)
	}
	labels := []string{"nevus", "melanoma", "carcinoma"}
	grp, err := explain.Group(labels, "malignant", []string{"melanoma", "carcinoma"}, explain.Softmax)
	if err != nil || len(grp.Classes) != 2 || grp.Classes[0] != 1 || grp.Classes[1] != 2 {
		t.Errorf("group %+v %v", grp, err)
	}
	if _, err := explain.Group(labels, "malignant", []string{"melanoma"}, explain.Logit); err == nil {
		t.Error("logit group accepted")
	}
	if _, err := explain.ClassByName(labels, "lentigo", explain.Logit); err == nil {
		t.Error("unknown class accepted")
	}
}

// SmoothGrad (Smilkov et al. 2017) with no noise is the mean of n identical
// gradients: the gradient, bit for bit.
func TestSmoothGradZeroSigma(t *testing.T) {
	net := explaintest.NewMLP(3, 4, 4, 16, 3, 21)
	x := explaintest.RandomInput(3, 4, 4, 22)
	g, err := explain.Gradient{}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	s, err := explain.SmoothGrad{Samples: 5, Sigma: -1, BatchSize: 2}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(f32bytes(g.Channels.F32), f32bytes(s.Channels.F32)) || !bytes.Equal(f32bytes(g.Map.Data), f32bytes(s.Map.Data)) {
		t.Error("SmoothGrad with σ = 0 differs from the gradient")
	}
	// With noise it differs, and is reproducible across batch sizes.
	a, _ := explain.SmoothGrad{Samples: 6, Seed: 4, BatchSize: 4}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	b, _ := explain.SmoothGrad{Samples: 6, Seed: 4, BatchSize: 1}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if !bytes.Equal(f32bytes(a.Map.Data), f32bytes(b.Map.Data)) {
		t.Error("SmoothGrad depends on the batch size")
	}
	if bytes.Equal(f32bytes(a.Map.Data), f32bytes(g.Map.Data)) {
		t.Error("SmoothGrad with noise equals the gradient")
	}
}

// Grad-CAM (Selvaraju et al. 2017, eqs. 1–2) on the linear model with the
// input itself as the layer: α_c = mean_ij w_c,ij, L = ReLU(Σ_c α_c x_c).
func TestGradCAMLinear(t *testing.T) {
	net := explaintest.NewLinear(3, 5, 6, 4, 31)
	x := explaintest.RandomInput(3, 5, 6, 32)
	r, err := explain.GradCAM{Layer: "input"}.Attribute(ctx, net, x, explain.Class(0, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	var alpha [3]float64
	for c := 0; c < 3; c++ {
		for p := 0; p < 30; p++ {
			alpha[c] += float64(net.W[c*30+p]) / 30
		}
	}
	for p := 0; p < 30; p++ {
		var s float64
		for c := 0; c < 3; c++ {
			s += alpha[c] * float64(x.F32[c*30+p])
		}
		if want := math.Max(s, 0); !closeTo(float64(r.Map.Data[p]), want, 1e-6) {
			t.Errorf("pixel %d: %v, want %v", p, r.Map.Data[p], want)
		}
	}
}

// The upsampling convention against PyTorch's
// F.interpolate(mode="bilinear", align_corners=False); golden made by
// testdata/upsample_golden.py (run with /usr/bin/python3).
func TestUpsampleGolden(t *testing.T) {
	b, err := os.ReadFile("testdata/upsample_golden.txt")
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSpace(string(b)), "\n")
	var in, want []float32
	var ih, iw, oh, ow int
	parse := func(s string) []float32 {
		var out []float32
		for _, f := range strings.Fields(s) {
			v, err := strconv.ParseFloat(f, 64)
			if err != nil {
				t.Fatal(err)
			}
			out = append(out, float32(v))
		}
		return out
	}
	sz := parse(lines[0])
	ih, iw, oh, ow = int(sz[0]), int(sz[1]), int(sz[2]), int(sz[3])
	in, want = parse(lines[1]), parse(lines[2])
	got := explain.Upsample(explain.Map{W: iw, H: ih, Data: in}, ow, oh)
	for i := range want {
		if math.Abs(float64(got.Data[i]-want[i])) > 1e-5 {
			t.Fatalf("upsample[%d] = %v, torch %v", i, got.Data[i], want[i])
		}
	}
}

// RISE (Petsiuk et al. 2018) on a linear model whose class-0 score depends
// on one pixel q only: score(x ⊙ M) = a·M(q) with a = w_q x_q. Each upsampled
// mask value is M(λ) = Σ_k φ_k(λ) G_k, a convex combination (bilinear
// weights φ, Σφ = 1) of independent Bernoulli(p) grid cells G_k, given the
// random shift. Hence
//   - for λ whose interpolation cells never overlap q's (any shift),
//     E[M(q)M(λ)] = p², so E[map(λ)] = a·p²/p = a·p;
//   - at λ = q, E[M(q)²] = p² + p(1−p)Σφ², with ¼ ≤ Σφ² ≤ 1, so
//     a(p + (1−p)/4) ≤ E[map(q)] ≤ a.
//
// map(λ) is the mean of N terms a·M(q)M(λ)/p in [0, a/p], whose variance is
// at most (a/p)·E[term] = a² at far λ: sd ≤ a/√N. We allow 5 sd.
// Class 1 has only a bias b: map = b·mean(M)/p, expectation b (E[M] = p),
// term variance ≤ b²/p, sd ≤ b/√(pN).
func TestRISEExpectation(t *testing.T) {
	const h, w, n, p = 28, 28, 4000, 0.5
	net := explaintest.NewLinear(1, h, w, 2, 41)
	for i := range net.W {
		net.W[i] = 0
	}
	q := 3*w + 3
	net.W[q] = 2
	net.B[0], net.B[1] = 0, 1.5
	x := tensor.New(1, 1, h, w)
	for i := range x.F32 {
		x.F32[i] = 1
	}
	a := 2.0
	r, err := explain.RISE{Masks: n, Grid: 7, P: p, Seed: 5, BatchSize: 64}.Attribute(ctx, net, x, explain.Class(0, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	tol := 5 * a / math.Sqrt(n)
	// Cell size C = ⌈28/7⌉ = 4; 7 grid samples span (7+1)·4 = 32 upsampled
	// pixels. q at 3 (plus shift < 4) uses cells 0–1; pixels at 12 or more
	// (plus shift) use cells ≥ 2, so one coordinate ≥ 12 suffices.
	far := 0
	for y := 0; y < h; y++ {
		for xx := 0; xx < w; xx++ {
			if xx < 12 && y < 12 {
				continue
			}
			far++
			if v := float64(r.Map.Data[y*w+xx]); math.Abs(v-a*p) > tol {
				t.Errorf("far pixel (%d,%d): %v, expectation %v ± %v", xx, y, v, a*p, tol)
			}
		}
	}
	if v := float64(r.Map.Data[q]); v < a*(p+(1-p)/4)-tol || v > a+tol {
		t.Errorf("map(q) = %v, want in [%v, %v]", v, a*(p+(1-p)/4), a)
	}
	r1, err := explain.RISE{Masks: n, Grid: 7, P: p, Seed: 6}.Attribute(ctx, net, x, explain.Class(1, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	tol1 := 5 * 1.5 / math.Sqrt(p*n)
	for i, v := range r1.Map.Data {
		if math.Abs(float64(v)-1.5) > tol1 {
			t.Fatalf("bias-only map[%d] = %v, want 1.5 ± %v", i, v, tol1)
		}
	}
	// Same seed, other batch size: byte-identical.
	r2, _ := explain.RISE{Masks: 300, Seed: 5, BatchSize: 7}.Attribute(ctx, net, x, explain.Class(0, explain.Logit))
	r3, _ := explain.RISE{Masks: 300, Seed: 5, BatchSize: 32}.Attribute(ctx, net, x, explain.Class(0, explain.Logit))
	if !bytes.Equal(f32bytes(r2.Map.Data), f32bytes(r3.Map.Data)) {
		t.Error("RISE depends on the batch size")
	}
}

// A network with a fixed batch dimension gets full batches (padded).
func TestFixedBatch(t *testing.T) {
	net := explaintest.NewLinear(1, 4, 4, 2, 51)
	net.Batch = 4
	x := explaintest.RandomInput(1, 4, 4, 52)
	fixed, err := explain.IntegratedGradients{Steps: 10}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	net.Batch = -1
	free, err := explain.IntegratedGradients{Steps: 10}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(f32bytes(fixed.Map.Data), f32bytes(free.Map.Data)) {
		t.Error("fixed-batch network gives another map")
	}
	for _, m := range []explain.Method{explain.Gradient{}, explain.GradCAM{Layer: "input"}, explain.RISE{Masks: 10}} {
		net.Batch = 4
		a, err := m.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
		if err != nil {
			t.Fatalf("%s, fixed batch: %v", m.Name(), err)
		}
		net.Batch = -1
		b, err := m.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(f32bytes(a.Map.Data), f32bytes(b.Map.Data)) {
			t.Errorf("%s: fixed-batch network gives another map", m.Name())
		}
	}
}

// NPY format (NEP 1 / numpy.lib.format): magic, version 1.0, little-endian
// uint16 header length, dict literal, '\n', data aligned; and, where Debian's
// NumPy is installed, numpy.load reads back the same values.
func TestNPY(t *testing.T) {
	m := explain.Map{W: 3, H: 2, Data: []float32{1, -2.5, 3, 0.125, 5e-8, -6}}
	var buf bytes.Buffer
	if err := explain.WriteNPY(&buf, m); err != nil {
		t.Fatal(err)
	}
	b := buf.Bytes()
	if string(b[:6]) != "\x93NUMPY" || b[6] != 1 || b[7] != 0 {
		t.Fatalf("bad magic/version % x", b[:8])
	}
	hl := int(binary.LittleEndian.Uint16(b[8:10]))
	header := string(b[10 : 10+hl])
	if (10+hl)%16 != 0 || !strings.HasSuffix(header, "\n") {
		t.Errorf("header length %d not aligned / not newline-terminated", hl)
	}
	for _, want := range []string{"'descr': '<f4'", "'fortran_order': False", "'shape': (2, 3)"} {
		if !strings.Contains(header, want) {
			t.Errorf("header %q lacks %s", header, want)
		}
	}
	data := b[10+hl:]
	if len(data) != 24 {
		t.Fatalf("%d data bytes", len(data))
	}
	for i, v := range m.Data {
		if got := math.Float32frombits(binary.LittleEndian.Uint32(data[4*i:])); got != v {
			t.Errorf("value %d: %v, want %v", i, got, v)
		}
	}
	py := "/usr/bin/python3"
	if exec.Command(py, "-c", "import numpy").Run() != nil {
		t.Skip("Debian python3-numpy not installed; skipping the numpy.load cross-check")
	}
	path := filepath.Join(t.TempDir(), "m.npy")
	if err := explain.SaveNPY(path, m); err != nil {
		t.Fatal(err)
	}
	out, err := exec.Command(py, "-c", "import numpy,sys; a=numpy.load(sys.argv[1]); print(a.dtype, a.shape, ' '.join(repr(float(v)) for v in a.ravel()))", path).CombinedOutput()
	if err != nil {
		t.Fatalf("numpy.load: %v\n%s", err, out)
	}
	f := strings.Fields(string(out))
	if len(f) != 3+len(m.Data) || f[0] != "float32" || f[1] != "(2," || f[2] != "3)" {
		t.Fatalf("numpy read %q", out)
	}
	for i, v := range m.Data {
		got, err := strconv.ParseFloat(f[3+i], 64)
		if err != nil || got != float64(v) {
			t.Errorf("numpy value %d = %s, want %v", i, f[3+i], v)
		}
	}
}

func f32bytes(v []float32) []byte {
	b := make([]byte, 4*len(v))
	for i, f := range v {
		binary.LittleEndian.PutUint32(b[4*i:], math.Float32bits(f))
	}
	return b
}

// SmoothGrad over integrated gradients with no noise is integrated
// gradients; with a noise baseline IG is reproducible from its seed.
func TestSmoothIGAndSeeds(t *testing.T) {
	net := explaintest.NewMLP(3, 4, 4, 16, 3, 81)
	x := explaintest.RandomInput(3, 4, 4, 82)
	ig := &explain.IntegratedGradients{Steps: 9, Baseline: explain.BaselineNoise, Seed: 3}
	a, err := ig.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	s, err := explain.SmoothGrad{Samples: 3, Sigma: -1, OverIG: ig}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	for i := range a.Map.Data {
		if !closeTo(float64(a.Map.Data[i]), float64(s.Map.Data[i]), 1e-6) {
			t.Fatalf("smoothgrad-ig with σ = 0: %v, IG %v", s.Map.Data[i], a.Map.Data[i])
		}
	}
	ig2 := *ig
	ig2.BatchSize = 2
	b, _ := ig2.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if !bytes.Equal(f32bytes(a.Map.Data), f32bytes(b.Map.Data)) {
		t.Error("IG with a noise baseline is not reproducible across batch sizes")
	}
	ig2.Seed = 4
	c, _ := ig2.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
	if bytes.Equal(f32bytes(a.Map.Data), f32bytes(c.Map.Data)) {
		t.Error("another noise seed gives the same map")
	}
}
