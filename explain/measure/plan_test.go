package measure

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"heedmap/explain"
)

func grid(w, h int, pts ...[2]int) []bool {
	m := make([]bool, w*h)
	for _, p := range pts {
		m[p[1]*w+p[0]] = true
	}
	return m
}

func near(a, b float64) bool { return math.Abs(a-b) < 1e-9 }

func mustPlan(t *testing.T, m Masks, p Params) *Plan {
	t.Helper()
	pl, err := NewPlan(m, p)
	if err != nil {
		t.Fatal(err)
	}
	return pl
}

func mustMeasure(t *testing.T, pl *Plan, method string, m explain.Map) Result {
	t.Helper()
	r, err := pl.Measure(method, m)
	if err != nil {
		t.Fatal(err)
	}
	return r
}

func want(t *testing.T, name string, v Value, x float64) {
	t.Helper()
	if !v.OK || !near(v.V, x) {
		t.Errorf("%s = %v, want %.6g", name, v, x)
	}
}

// Worked example for relevance mass accuracy and relevance rank accuracy
// (Arras, Osman, Samek, "CLEVR-XAI", Information Fusion 2022: mass =
// Σ_{p∈GT} R_p / Σ R_p; rank = |top-K ∩ GT| / K with K = |GT|), computed by
// hand on a 4×4 map with a 2×2 lesion in the top-left corner.
func TestMassAndRankWorkedExample(t *testing.T) {
	m := explain.Map{W: 4, H: 4, Data: []float32{
		4, 3, 0, -2,
		2, 1, 0, 0,
		0, 0, 5, 0,
		-1, 0, 0, 0,
	}}
	lesion := grid(4, 4, [2]int{0, 0}, [2]int{1, 0}, [2]int{0, 1}, [2]int{1, 1})
	art := grid(4, 4, [2]int{1, 0}, [2]int{2, 2}) // covers the 3 and the 5
	pl := mustPlan(t, Masks{W: 4, H: 4, Lesion: lesion, Artefacts: map[string][]bool{"ruler": art}}, DefaultParams())

	// Positive part: Σ A⁺ = 4+3+2+1+5 = 15, inside 10/15.
	// Top-4 = {5, 4, 3, 2}; 4, 3, 2 are on the lesion: 3/4.
	// Ruler: (3+5)/15.
	r := mustMeasure(t, pl, "integrated-gradients", m)
	want(t, "inside (A⁺)", r.InsideMass, 10.0/15)
	want(t, "rank (A⁺)", r.RankAccuracy, 0.75)
	want(t, "ruler (A⁺)", r.ArtefactMass["ruler"], 8.0/15)
	if r.Sign != Positive {
		t.Errorf("sign %v", r.Sign)
	}
	// Absolute value: Σ |A| = 18, inside 10/18, ruler 8/18. Top-4 of |A|
	// = {5, 4, 3} and one of the two tied 2s, one on the lesion (x=0, y=1)
	// and one off it (x=3, y=0): (2 + 1/2)/4 = 0.625.
	r = mustMeasure(t, pl, "SmoothGrad", m)
	want(t, "inside (|A|)", r.InsideMass, 10.0/18)
	want(t, "rank (|A|)", r.RankAccuracy, 0.625)
	want(t, "ruler (|A|)", r.ArtefactMass["ruler"], 8.0/18)
	if r.Sign != Absolute {
		t.Errorf("sign %v", r.Sign)
	}
	// Peak at the 5 (x=2, y=2), 2 px diagonally from the lesion: the
	// tolerance at 4 px input is 15·4/224 ≈ 0.27 px, so a miss.
	want(t, "pointing", r.PointingHit, 0)
	if r.PeakX != 2 || r.PeakY != 2 || r.PeakTies != 1 {
		t.Errorf("peak (%d,%d) ties %d", r.PeakX, r.PeakY, r.PeakTies)
	}
	if s := r.InsideMass.V + r.BandMass.V + r.FarMass.V; !near(s, 1) {
		t.Errorf("inside + band + far = %v", s)
	}
}

// Ties at the K-th value count fractionally (expected value under a random
// tie-break). Hand computation: lesion values {3, 1, 1, 0}, outside {2, 1,
// 0...}; K = 4. Top-4 holds 3 and 2 and two of the three tied 1s, of which
// two of three are on the lesion: hits = 1 + 2·(2/3), rank = 7/12.
func TestRankTies(t *testing.T) {
	lesion := grid(4, 4, [2]int{0, 0}, [2]int{1, 0}, [2]int{2, 0}, [2]int{3, 0})
	m := explain.Map{W: 4, H: 4, Data: []float32{
		3, 1, 1, 0,
		2, 1, 0, 0,
		0, 0, 0, 0,
		0, 0, 0, 0,
	}}
	pl := mustPlan(t, Masks{W: 4, H: 4, Lesion: lesion}, DefaultParams())
	want(t, "rank", mustMeasure(t, pl, "occlusion", m).RankAccuracy, 7.0/12)
	// A constant map: every ordering equally likely, rank = |M|/N = 4/16.
	for i := range m.Data {
		m.Data[i] = 1
	}
	want(t, "rank const", mustMeasure(t, pl, "occlusion", m).RankAccuracy, 0.25)
}

// Pointing game (Zhang et al., ECCV 2016; IJCV 2018): hit when the maximum
// lies within 15 px of the object (value from memory), here scaled as
// 15 px per 224 px. The lesion is the 2×2 block at x, y ∈ {10, 11}; the
// checks straddle the Euclidean disk: (26,10) is 15 px away (hit), (27,10)
// 16 px (miss), (21,22) √221 ≈ 14.87 px (hit), (22,22) √242 ≈ 15.56 px
// (miss; a square structuring element would call it a hit).
func TestPointingGameTolerance(t *testing.T) {
	cases := []struct {
		size, x, y int
		hit        float64
	}{
		{224, 26, 10, 1}, {224, 27, 10, 0}, {224, 21, 22, 1}, {224, 22, 22, 0}, {224, 11, 11, 1},
		// 448 px input: tolerance 30 px.
		{448, 41, 10, 1}, {448, 42, 10, 0},
	}
	for _, c := range cases {
		n := c.size
		lesion := grid(n, n, [2]int{10, 10}, [2]int{11, 10}, [2]int{10, 11}, [2]int{11, 11})
		pl := mustPlan(t, Masks{W: n, H: n, Lesion: lesion}, DefaultParams())
		if want := 15 * float64(n) / 224; !near(pl.TolerancePx(), want) {
			t.Errorf("tolerance at %d px = %v, want %v", n, pl.TolerancePx(), want)
		}
		m := explain.Map{W: n, H: n, Data: make([]float32, n*n)}
		m.Data[10*n+10] = 0.5
		m.Data[c.y*n+c.x] = 1
		r := mustMeasure(t, pl, "grad-cam", m)
		want(t, "pointing", r.PointingHit, c.hit)
		if r.TolerancePx != pl.TolerancePx() {
			t.Errorf("reported tolerance %v", r.TolerancePx)
		}
	}
}

// Tied maxima: a hit needs more than half of them within the tolerance.
func TestPointingTies(t *testing.T) {
	lesion := grid(8, 8, [2]int{0, 0})
	pl := mustPlan(t, Masks{W: 8, H: 8, Lesion: lesion}, Params{PointingTolerance224: 0, BandFraction: 0.25, HotFraction: 0.05})
	m := explain.Map{W: 8, H: 8, Data: make([]float32, 64)}
	m.Data[0], m.Data[63] = 1, 1
	r := mustMeasure(t, pl, "rise", m)
	want(t, "1 of 2 maxima on lesion", r.PointingHit, 0)
	if r.PeakTies != 2 {
		t.Errorf("ties %d", r.PeakTies)
	}
	lesion[1] = true
	pl = mustPlan(t, Masks{W: 8, H: 8, Lesion: lesion}, Params{PointingTolerance224: 0, BandFraction: 0.25, HotFraction: 0.05})
	m.Data[1] = 1
	want(t, "2 of 3 maxima on lesion", mustMeasure(t, pl, "rise", m).PointingHit, 1)
}

// Peri-lesional band: width = fraction · 2·sqrt(area/π). A one-pixel lesion
// has equivalent diameter 2/√π ≈ 1.128 px. Hand computation on a 5×5 map
// with the lesion at the centre: centre 4, 4-neighbours 1 each, diagonal
// neighbours 0.5 each, outer ring 0.125 each (Σ = 4 + 4 + 2 + 2 = 12).
// Fraction 1 → width 1.128 px: band = 4-neighbours, 4/12; far = 4/12.
// Fraction 1.3 → width 1.467 px ≥ √2: band also takes the diagonals, 6/12.
func TestBandWorkedExample(t *testing.T) {
	m := explain.Map{W: 5, H: 5, Data: make([]float32, 25)}
	for y := 0; y < 5; y++ {
		for x := 0; x < 5; x++ {
			dx, dy := abs(x-2), abs(y-2)
			var v float32
			switch {
			case dx == 0 && dy == 0:
				v = 4
			case dx+dy == 1:
				v = 1
			case dx == 1 && dy == 1:
				v = 0.5
			default:
				v = 0.125
			}
			m.Data[y*5+x] = v
		}
	}
	lesion := grid(5, 5, [2]int{2, 2})
	for _, c := range []struct{ frac, width, band, far float64 }{
		{1, 2 / math.Sqrt(math.Pi), 4.0 / 12, 4.0 / 12},
		{1.3, 1.3 * 2 / math.Sqrt(math.Pi), 6.0 / 12, 2.0 / 12},
	} {
		pl := mustPlan(t, Masks{W: 5, H: 5, Lesion: lesion}, Params{PointingTolerance224: 15, BandFraction: c.frac, HotFraction: 0.05})
		r := mustMeasure(t, pl, "occlusion", m)
		if !near(r.BandWidthPx, c.width) {
			t.Errorf("band width %v, want %v", r.BandWidthPx, c.width)
		}
		want(t, "inside", r.InsideMass, 4.0/12)
		want(t, "band", r.BandMass, c.band)
		want(t, "far", r.FarMass, c.far)
	}
	// A 10×10 lesion: equivalent diameter 2·sqrt(100/π), default width a
	// quarter of it ≈ 2.821 px.
	var pts [][2]int
	for y := 5; y < 15; y++ {
		for x := 5; x < 15; x++ {
			pts = append(pts, [2]int{x, y})
		}
	}
	pl := mustPlan(t, Masks{W: 20, H: 20, Lesion: grid(20, 20, pts...)}, DefaultParams())
	if w := 0.25 * 2 * math.Sqrt(100/math.Pi); !near(pl.BandWidthPx(), w) {
		t.Errorf("band width %v, want %v", pl.BandWidthPx(), w)
	}
}

func abs(x int) int {
	if x < 0 {
		return -x
	}
	return x
}

// Hot regions, hand computation on 10×10: lesion pixel (0,0) = 10; a
// diagonal pair (5,5),(6,6) = 4 each; a vertical pair (9,0),(9,1) = 3 each;
// (2,8) = 2. Σ = 26. Top 5 % = 5 pixels → threshold 3 (the fifth largest).
// With 8-connectivity the diagonal pair is one region (4-connectivity would
// split it), so: region 1 mass 8/26 box (5,5)–(6,6), region 2 mass 6/26
// box (9,0)–(9,1); (2,8) is below the threshold.
func TestHotRegionsWorkedExample(t *testing.T) {
	m := explain.Map{W: 10, H: 10, Data: make([]float32, 100)}
	set := func(x, y int, v float32) { m.Data[y*10+x] = v }
	set(0, 0, 10)
	set(5, 5, 4)
	set(6, 6, 4)
	set(9, 0, 3)
	set(9, 1, 3)
	set(2, 8, 2)
	pl := mustPlan(t, Masks{W: 10, H: 10, Lesion: grid(10, 10, [2]int{0, 0})}, Params{PointingTolerance224: 15, BandFraction: 0, HotFraction: 0.05})
	r := mustMeasure(t, pl, "occlusion", m)
	want(t, "threshold", r.HotThreshold, 3)
	if len(r.HotRegions) != 2 {
		t.Fatalf("got %d regions %+v, want 2", len(r.HotRegions), r.HotRegions)
	}
	a, b := r.HotRegions[0], r.HotRegions[1]
	if a.AreaPx != 2 || !near(a.Mass, 8.0/26) || a.X0 != 5 || a.Y0 != 5 || a.X1 != 6 || a.Y1 != 6 || a.Peak != 4 || !near(a.AreaFraction, 0.02) {
		t.Errorf("region 1 %+v", a)
	}
	if b.AreaPx != 2 || !near(b.Mass, 6.0/26) || b.X0 != 9 || b.Y0 != 0 || b.X1 != 9 || b.Y1 != 1 {
		t.Errorf("region 2 %+v", b)
	}
	// A wider band: (5,5) and (6,6) are √50 ≈ 7.07 and √72 ≈ 8.49 px from
	// the lesion, (9,0) is 9 px. Width = frac·2/√π; frac = 7.7 gives
	// 8.69 px: the diagonal pair is now peri-lesional, the vertical pair is
	// still off-lesion.
	pl = mustPlan(t, Masks{W: 10, H: 10, Lesion: grid(10, 10, [2]int{0, 0})}, Params{PointingTolerance224: 15, BandFraction: 7.7, HotFraction: 0.05})
	r = mustMeasure(t, pl, "occlusion", m)
	if len(r.HotRegions) != 1 || r.HotRegions[0].X0 != 9 {
		t.Errorf("with band 8.46 px: %+v", r.HotRegions)
	}
}

func TestUndefinedCases(t *testing.T) {
	m := explain.Map{W: 4, H: 4, Data: make([]float32, 16)}
	m.Data[5] = 1
	art := map[string][]bool{"ink": grid(4, 4, [2]int{1, 1})}
	// Empty lesion: lesion measures undefined, artefact mass still defined.
	pl := mustPlan(t, Masks{W: 4, H: 4, Lesion: make([]bool, 16), Artefacts: art}, DefaultParams())
	r := mustMeasure(t, pl, "occlusion", m)
	if r.InsideMass.OK || !strings.Contains(r.InsideMass.Reason, "empty") || r.PointingHit.OK || r.RankAccuracy.OK {
		t.Errorf("empty lesion: %+v", r)
	}
	want(t, "ink", r.ArtefactMass["ink"], 1)
	// Lesion cropped away: the seen mask excludes it.
	lesion := grid(4, 4, [2]int{0, 0})
	seen := make([]bool, 16)
	for i := 8; i < 16; i++ {
		seen[i] = true
	}
	pl = mustPlan(t, Masks{W: 4, H: 4, Lesion: lesion, Seen: seen, SourceLesionPixels: 30}, DefaultParams())
	r = mustMeasure(t, pl, "occlusion", m)
	if r.InsideMass.OK || !strings.Contains(r.InsideMass.Reason, "outside the region the model saw") {
		t.Errorf("cropped lesion: %v", r.InsideMass)
	}
	pl = mustPlan(t, Masks{W: 4, H: 4, Lesion: lesion, Artefacts: art}, DefaultParams())
	// All-zero, all-negative (positive part) and non-finite maps.
	neg := explain.Map{W: 4, H: 4, Data: make([]float32, 16)}
	for i := range neg.Data {
		neg.Data[i] = -1
	}
	nan := explain.Map{W: 4, H: 4, Data: make([]float32, 16)}
	nan.Data[3] = float32(math.NaN())
	inf := explain.Map{W: 4, H: 4, Data: make([]float32, 16)}
	inf.Data[3] = float32(math.Inf(1))
	for name, mm := range map[string]explain.Map{"zero": {W: 4, H: 4, Data: make([]float32, 16)}, "negative": neg, "nan": nan, "inf": inf} {
		r := mustMeasure(t, pl, "integrated-gradients", mm)
		if r.Undefined == "" || r.InsideMass.OK || r.ArtefactMass["ink"].OK || r.InsideMass.Reason == "" {
			t.Errorf("%s map: %+v", name, r)
		}
		b, err := json.Marshal(r)
		if err != nil {
			t.Fatal(err)
		}
		if !json.Valid(b) || strings.Contains(string(b), ":NaN") || !strings.Contains(string(b), `"inside_mass":{"value":null,"reason":`) {
			t.Errorf("%s map JSON: %s", name, b)
		}
	}
	// The all-negative map is defined under the absolute-value convention.
	want(t, "gradient on negative map", mustMeasure(t, pl, "gradient", neg).InsideMass, 1.0/16)
}

func TestValueJSON(t *testing.T) {
	for _, v := range []Value{Num(0.25), Undef("lesion mask is empty"), Num(math.NaN())} {
		b, err := json.Marshal(v)
		if err != nil {
			t.Fatal(err)
		}
		var back Value
		if err := json.Unmarshal(b, &back); err != nil {
			t.Fatal(err)
		}
		if back != v {
			t.Errorf("%s round-trips to %+v from %+v", b, back, v)
		}
	}
	if b, _ := json.Marshal(Undef("x")); string(b) != `{"value":null,"reason":"x"}` {
		t.Errorf("undefined JSON %s", b)
	}
}

func TestBadInput(t *testing.T) {
	if _, err := NewPlan(Masks{W: 4, H: 4, Lesion: make([]bool, 15)}, DefaultParams()); err == nil {
		t.Error("short lesion mask accepted")
	}
	if _, err := NewPlan(Masks{W: 4, H: 4, Lesion: make([]bool, 16), Artefacts: map[string][]bool{"hair": make([]bool, 3)}}, DefaultParams()); err == nil || !strings.Contains(err.Error(), "hair") {
		t.Errorf("short artefact mask: %v", err)
	}
	if _, err := NewPlan(Masks{W: 4, H: 4, Lesion: make([]bool, 16)}, Params{HotFraction: 0}); err == nil {
		t.Error("zero hot fraction accepted")
	}
	pl := mustPlan(t, Masks{W: 4, H: 4, Lesion: make([]bool, 16)}, DefaultParams())
	if _, err := pl.Measure("occlusion", explain.Map{W: 3, H: 4, Data: make([]float32, 12)}); err == nil {
		t.Error("wrong map size accepted")
	}
	if _, err := pl.Measure("guided-backprop", explain.Map{W: 4, H: 4, Data: make([]float32, 16)}); err == nil {
		t.Error("unknown method accepted")
	}
}

func TestSignTable(t *testing.T) {
	for name, s := range map[string]Sign{
		MethodOcclusion: Positive, MethodIntegratedGradients: Positive, MethodGradientXInput: Positive,
		MethodGradCAM: Positive, MethodRISE: Positive, MethodSmoothGradIG: Positive, "Grad-CAM": Positive, "gradient×input": Positive,
		MethodGradient: Absolute, MethodSmoothGrad: Absolute, "Smooth_Grad": Absolute,
	} {
		got, err := SignFor(name)
		if err != nil || got != s {
			t.Errorf("SignFor(%q) = %v, %v; want %v", name, got, err, s)
		}
	}
}

// The distance transform against its definition, brute force.
func TestSquaredEDTBruteForce(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	for trial := 0; trial < 20; trial++ {
		w, h := 1+rng.IntN(17), 1+rng.IntN(13)
		in := make([]bool, w*h)
		any := false
		for i := range in {
			in[i] = rng.Float64() < 0.08
			any = any || in[i]
		}
		d := squaredEDT(in, w, h)
		for y := 0; y < h; y++ {
			for x := 0; x < w; x++ {
				best := edtInf
				for j, b := range in {
					if b {
						dx, dy := float64(x-j%w), float64(y-j/w)
						best = min(best, dx*dx+dy*dy)
					}
				}
				if !any {
					if d[y*w+x] < edtInf/2 {
						t.Fatalf("empty mask gave finite distance")
					}
					continue
				}
				if d[y*w+x] != best {
					t.Fatalf("%d×%d at (%d,%d): %v, brute force %v", w, h, x, y, d[y*w+x], best)
				}
			}
		}
	}
}

// The unseen part of the lesion is reported per image (issue: "report per
// image how much of the lesion the model never saw"), never as a silent
// zero: supplied values pass through, a lesion wholly outside the view is
// 1, an empty lesion and a missing geometry are undefined with a reason.
func TestLesionUnseen(t *testing.T) {
	m := explain.Map{W: 4, H: 4, Data: make([]float32, 16)}
	m.Data[0] = 1
	lesion := grid(4, 4, [2]int{0, 0}, [2]int{1, 0})
	top := make([]bool, 16)
	for i := 0; i < 8; i++ {
		top[i] = true
	}
	for _, c := range []struct {
		name   string
		masks  Masks
		want   float64 // -1 = undefined
		reason string
	}{
		{"supplied", Masks{W: 4, H: 4, Lesion: lesion, SourceLesionPixels: 40, LesionUnseen: Num(0.25)}, 0.25, ""},
		{"all cropped", Masks{W: 4, H: 4, Lesion: lesion, Seen: make([]bool, 16), SourceLesionPixels: 40}, 1, ""},
		{"seen, caller silent", Masks{W: 4, H: 4, Lesion: lesion, Seen: top, SourceLesionPixels: 40}, -1, "not measured"},
		{"empty", Masks{W: 4, H: 4, Lesion: make([]bool, 16)}, -1, "empty"},
	} {
		pl := mustPlan(t, c.masks, DefaultParams())
		r := mustMeasure(t, pl, "occlusion", m)
		switch {
		case c.want >= 0 && (!r.LesionUnseen.OK || r.LesionUnseen.V != c.want):
			t.Errorf("%s: unseen %v, want %v", c.name, r.LesionUnseen, c.want)
		case c.want < 0 && (r.LesionUnseen.OK || !strings.Contains(r.LesionUnseen.Reason, c.reason)):
			t.Errorf("%s: unseen %v, want undefined (%s)", c.name, r.LesionUnseen, c.reason)
		}
	}
	if _, err := NewPlan(Masks{W: 4, H: 4, Lesion: lesion, LesionUnseen: Num(1.5)}, DefaultParams()); err == nil {
		t.Error("unseen fraction 1.5 accepted")
	}
}
