package explain_test

import (
	"math"
	"os"
	"path/filepath"
	"testing"

	"heedmap/explain"
	"heedmap/explain/explaintest"
)

// Targets by class name from a labels file, named groups and multi-label
// sigmoid scores, end to end through the gradient method on a linear model
// z = Wx + b, against the closed-form derivatives:
//
//	softmax  p_c = e^{z_c}/Σ_j e^{z_j},  ∂p_c/∂x = p_c (w_c − Σ_j p_j w_j)
//	sigmoid  σ_c = 1/(1 + e^{−z_c}),      ∂σ_c/∂x = σ_c (1 − σ_c) w_c
//
// and a group's score and gradient are the sums over its members (the
// issue's definition: the sum of the member classes' probabilities).
func TestTargetsByNameAndGroup(t *testing.T) {
	path := filepath.Join(t.TempDir(), "labels.txt")
	// BOM, CRLF line ends, trailing spaces and blank lines at the end.
	if err := os.WriteFile(path, []byte("\ufeffnevus\r\nmelanoma \r\ncarcinoma\r\nkeratosis\r\n\r\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	labels, err := explain.ReadLabels(path)
	if err != nil {
		t.Fatal(err)
	}
	if len(labels) != 4 || labels[0] != "nevus" || labels[1] != "melanoma" || labels[3] != "keratosis" {
		t.Fatalf("labels %q", labels)
	}
	dup := filepath.Join(t.TempDir(), "dup.txt")
	os.WriteFile(dup, []byte("a\nb\na\n"), 0o644)
	if _, err := explain.ReadLabels(dup); err == nil {
		t.Error("duplicate label accepted")
	}

	const c, h, w = 3, 4, 5
	d := c * h * w
	net := explaintest.NewLinear(c, h, w, 4, 91)
	for i := range net.W {
		net.W[i] *= 0.2 // keep the softmax away from saturation
	}
	x := explaintest.RandomInput(c, h, w, 92)
	z := make([]float64, 4)
	for k := range z {
		z[k] = float64(net.B[k])
		for i := 0; i < d; i++ {
			z[k] += float64(net.W[k*d+i]) * float64(x.F32[i])
		}
	}
	var zs float64
	for _, v := range z {
		zs += math.Exp(v)
	}
	p := func(k int) float64 { return math.Exp(z[k]) / zs }
	sig := func(k int) float64 { return 1 / (1 + math.Exp(-z[k])) }
	softGrad := func(k, i int) float64 {
		var m float64
		for j := range z {
			m += p(j) * float64(net.W[j*d+i])
		}
		return p(k) * (float64(net.W[k*d+i]) - m)
	}
	sigGrad := func(k, i int) float64 { return sig(k) * (1 - sig(k)) * float64(net.W[k*d+i]) }

	check := func(name string, tg explain.Target, score float64, grad func(i int) float64) {
		t.Helper()
		r, err := explain.Gradient{}.Attribute(ctx, net, x, tg)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		if math.Abs(r.Score-score) > 1e-6 {
			t.Errorf("%s: score %v, want %v", name, r.Score, score)
		}
		if r.Target.Name != tg.Name || r.Target.Score != tg.Score {
			t.Errorf("%s: result states target %q/%v", name, r.Target.Name, r.Target.Score)
		}
		for i := 0; i < d; i++ {
			if g := float64(r.Channels.F32[i]); math.Abs(g-grad(i)) > 1e-6 {
				t.Fatalf("%s: ∂S/∂x[%d] = %v, want %v", name, i, g, grad(i))
			}
		}
	}
	mel, err := explain.ClassByName(labels, "melanoma", explain.Softmax)
	if err != nil {
		t.Fatal(err)
	}
	check("softmax melanoma", mel, p(1), func(i int) float64 { return softGrad(1, i) })
	grp, err := explain.Group(labels, "malignant", []string{"melanoma", "carcinoma"}, explain.Softmax)
	if err != nil {
		t.Fatal(err)
	}
	check("softmax group", grp, p(1)+p(2), func(i int) float64 { return softGrad(1, i) + softGrad(2, i) })
	ml, _ := explain.ClassByName(labels, "keratosis", explain.Sigmoid)
	check("sigmoid keratosis", ml, sig(3), func(i int) float64 { return sigGrad(3, i) })
	mg, _ := explain.Group(labels, "malignant", []string{"melanoma", "carcinoma"}, explain.Sigmoid)
	check("sigmoid group", mg, sig(1)+sig(2), func(i int) float64 { return sigGrad(1, i) + sigGrad(2, i) })
	if _, err := explain.Group(labels, "x", []string{"melanoma", "lentigo"}, explain.Softmax); err == nil {
		t.Error("group with an unknown member accepted")
	}
}

// ParseTarget's forms resolve to the same targets as the constructors.
func TestParseTarget(t *testing.T) {
	labels := []string{"nevus", "melanoma", "carcinoma"}
	for _, c := range []struct {
		spec    string
		classes []int
		name    string
	}{
		{"", nil, ""}, {"predicted", nil, ""}, {"2", []int{2}, "carcinoma"}, {"melanoma", []int{1}, "melanoma"},
		{"malignant = melanoma + carcinoma", []int{1, 2}, "malignant"},
	} {
		tg, err := explain.ParseTarget(c.spec, labels, explain.Softmax)
		if err != nil {
			t.Errorf("%q: %v", c.spec, err)
			continue
		}
		if len(tg.Classes) != len(c.classes) || tg.Name != c.name || tg.Score != explain.Softmax {
			t.Errorf("%q: %+v", c.spec, tg)
			continue
		}
		for i := range c.classes {
			if tg.Classes[i] != c.classes[i] {
				t.Errorf("%q: %+v", c.spec, tg)
			}
		}
	}
	for _, bad := range []string{"lentigo", "7", "g=melanoma+lentigo", "g="} {
		if _, err := explain.ParseTarget(bad, labels, explain.Softmax); err == nil {
			t.Errorf("%q accepted", bad)
		}
	}
	if _, err := explain.ParseTarget("g=melanoma", labels, explain.Logit); err == nil {
		t.Error("logit group accepted")
	}
}
