package measure

import (
	"context"
	"os"
	"strings"
	"testing"
)

func res(method string, inside float64, hit float64, art map[string]float64) Result {
	r := Result{Method: method, Sign: Positive, InsideMass: Num(inside), RankAccuracy: Num(inside),
		PointingHit: Num(hit), BandMass: Num(0), FarMass: Num(1 - inside),
		ArtefactMass: map[string]Value{}, ArtefactPixels: map[string]int{}}
	for k, v := range art {
		r.ArtefactMass[k] = Num(v)
		r.ArtefactPixels[k] = 10
	}
	return r
}

func testImages() []Image {
	und := Result{Method: "occlusion", Sign: Positive, InsideMass: Undef("lesion mask is empty"),
		RankAccuracy: Undef("lesion mask is empty"), PointingHit: Undef("lesion mask is empty"),
		ArtefactMass: map[string]Value{"ruler": Num(0.3)}, ArtefactPixels: map[string]int{"ruler": 5}}
	return []Image{
		{ID: "a", TrueClass: "mel", PredClass: "mel", Score: 0.9, Results: []Result{res("occlusion", 0.8, 1, nil), res("gradient", 0.6, 1, nil)}},
		{ID: "b", TrueClass: "mel", PredClass: "nev", Score: 0.7, Results: []Result{res("occlusion", 0.3, 0, map[string]float64{"ink": 0.1}), res("gradient", 0.5, 0, nil)}},
		{ID: "c", TrueClass: "nev", PredClass: "nev", Score: 0.8, Results: []Result{res("occlusion", 0.6, 1, map[string]float64{"ruler": 0.25}), res("gradient", 0.7, 1, nil)}},
		{ID: "d", TrueClass: "nev", PredClass: "nev", Score: 0.6, Results: []Result{res("occlusion", 0.3, 0, map[string]float64{"ruler": 0.5}), res("gradient", 0.2, 0, nil)}},
		{ID: "e", PredClass: "mel", Score: 0.5, Results: []Result{und, res("gradient", 0.9, 1, nil)}},
	}
}

func TestSummarize(t *testing.T) {
	s, err := Summarize(context.Background(), testImages(), DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	if s.Primary != "occlusion" || len(s.Methods) != 2 {
		t.Fatalf("primary %q, %d methods", s.Primary, len(s.Methods))
	}
	occ, _ := s.Method("occlusion")
	// Inside masses 0.8, 0.3, 0.6, 0.3 (one undefined): mean 0.5, median 0.45.
	want(t, "mean", occ.MeanInside, 0.5)
	want(t, "median", occ.MedianInside, 0.45)
	if occ.Defined != 4 || occ.Undefined != 1 || occ.UndefinedReasons["lesion mask is empty"] != 1 {
		t.Errorf("defined %d undefined %d %v", occ.Defined, occ.Undefined, occ.UndefinedReasons)
	}
	if lo, hi := occ.MeanInsideCI.Lo.V, occ.MeanInsideCI.Hi.V; !(lo >= 0.3 && lo < 0.5 && hi > 0.5 && hi <= 0.8) {
		t.Errorf("mean CI %v–%v", lo, hi)
	}
	// Pointing: 2 hits of 4 defined; Wilson 2/4 from the same formula.
	lo, hi, _ := Wilson(2, 4, Z95)
	if occ.Pointing.K != 2 || occ.Pointing.N != 4 || occ.Pointing.CI.Lo.V != lo || occ.Pointing.CI.Hi.V != hi {
		t.Errorf("pointing %+v", occ.Pointing)
	}
	// Flagged (inside < 0.5 or artefact > 0.2): b (0.3), c (ruler 0.25),
	// d (0.3, ruler 0.5), e (ruler 0.3 with undefined inside) → 4 of 5.
	if occ.Flagged.K != 4 || occ.Flagged.N != 5 {
		t.Errorf("flagged %+v", occ.Flagged)
	}
	// Worst first: d and b tie at 0.3, d has the larger artefact mass; then
	// c (0.6); then e (inside undefined).
	var order []string
	for _, f := range s.Flagged {
		order = append(order, f.ID)
	}
	if strings.Join(order, ",") != "d,b,c,e" {
		t.Errorf("flag order %v", order)
	}
	if s.Flagged[0].Rank != 1 || s.Flagged[0].WorstArtefact != "ruler" || len(s.Flagged[0].Reasons) != 2 {
		t.Errorf("first flag %+v", s.Flagged[0])
	}
	// Breakdowns.
	groups := map[string]int{}
	for _, b := range s.Breakdowns {
		groups[b.By+"="+b.Group] = b.Images
	}
	for k, n := range map[string]int{"true_class=mel": 2, "true_class=nev": 2, "true_class=(unknown)": 1,
		"pred_class=nev": 3, "correctness=correct": 3, "correctness=incorrect": 1, "correctness=unknown": 1,
		"artefact=ruler": 3, "artefact=ink": 1, "artefact=(none)": 1} {
		if groups[k] != n {
			t.Errorf("breakdown %s has %d images, want %d (all: %v)", k, groups[k], n, groups)
		}
	}
	// Mean ruler mass over the images with a ruler: (0.25+0.5+0.3)/3.
	want(t, "ruler mean", occ.ArtefactMean["ruler"], (0.25+0.5+0.3)/3)

	// Determinism.
	s2, _ := Summarize(context.Background(), testImages(), DefaultSummaryOptions())
	o2, _ := s2.Method("occlusion")
	if o2.MeanInsideCI != occ.MeanInsideCI || o2.MedianInsideCI != occ.MedianInsideCI {
		t.Error("summary not deterministic")
	}
	o := DefaultSummaryOptions()
	o.Primary = "nope"
	if _, err := Summarize(context.Background(), testImages(), o); err == nil {
		t.Error("unknown primary accepted")
	}
}

func TestSummarizeEmpty(t *testing.T) {
	s, err := Summarize(context.Background(), []Image{{ID: "x", Results: []Result{{Method: "rise", Undefined: "all zero",
		InsideMass: Undef("all zero"), PointingHit: Undef("all zero")}}}}, DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	m := s.Methods[0]
	if m.MeanInside.OK || m.MedianInsideCI.Lo.OK || m.Pointing.P.OK || m.Flagged.P.OK || m.Flagged.N != 0 {
		t.Errorf("%+v", m)
	}
}

const criteriaYAML = `# acceptance
criteria:
  - id: occ-median
    method: occlusion
    statistic: median_inside_mass
    compare: ">="
    threshold: 0.4
  - method: occlusion
    statistic: flagged_rate
    compare: "<="
    threshold: 0.5
  - method: gradient
    statistic: pointing_accuracy
    compare: ">="
    threshold: 0.6
`

func TestCriteria(t *testing.T) {
	cs, err := ParseCriteria([]byte(criteriaYAML), "accept.yaml")
	if err != nil {
		t.Fatal(err)
	}
	if len(cs) != 3 || cs[0].ID != "occ-median" || cs[0].Line != 3 || cs[1].Line != 8 || cs[2].Threshold != 0.6 {
		t.Fatalf("%+v", cs)
	}
	s, _ := Summarize(context.Background(), testImages(), DefaultSummaryOptions())
	vs, err := Evaluate(cs, s, "accept.yaml")
	if err != nil {
		t.Fatal(err)
	}
	// median 0.45 ≥ 0.4 pass; flagged 0.8 ≤ 0.5 fail; gradient pointing 3/5 ≥ 0.6 pass.
	if !vs[0].Pass || vs[1].Pass || !vs[2].Pass || vs[1].Measured.V != 0.8 {
		t.Errorf("%+v", vs)
	}
	for _, c := range []struct{ yaml, msg string }{
		{strings.Replace(criteriaYAML, "flagged_rate", "flaged_rate", 1), "accept.yaml:9: unknown statistic \"flaged_rate\""},
		{strings.Replace(criteriaYAML, `"<="`, `"<"`, 1), "accept.yaml:10: compare"},
		{strings.Replace(criteriaYAML, "threshold: 0.6", "treshold: 0.6", 1), "accept.yaml:15: unknown key \"treshold\""},
		{"criteria: []\n", "no criteria"},
		{"rules:\n  - x: 1\n", "accept.yaml:1: unknown key \"rules\""},
		{"", "empty"},
	} {
		_, err := ParseCriteria([]byte(c.yaml), "accept.yaml")
		if err == nil || !strings.Contains(err.Error(), c.msg) {
			t.Errorf("want error containing %q, got %v", c.msg, err)
		}
	}
	cs[2].Method = "gradcam"
	if _, err := Evaluate(cs, s, "accept.yaml"); err == nil || !strings.Contains(err.Error(), "accept.yaml:12") {
		t.Errorf("unmeasured method: %v", err)
	}
	// An undefined statistic fails with a note.
	und := &Summary{Methods: []MethodStats{{Method: "occlusion", MedianInside: Undef("no image with a defined value")}}}
	vs, _ = Evaluate(cs[:1], und, "accept.yaml")
	if vs[0].Pass || !strings.Contains(vs[0].Note, "undefined") {
		t.Errorf("%+v", vs[0])
	}
}

func TestExampleCriteriaFileParses(t *testing.T) {
	b, err := os.ReadFile("testdata/acceptance.example.yaml")
	if err != nil {
		t.Fatal(err)
	}
	cs, err := ParseCriteria(b, "testdata/acceptance.example.yaml")
	if err != nil || len(cs) != 3 || cs[2].Statistic != "flagged_rate_upper95" {
		t.Errorf("%+v %v", cs, err)
	}
}
