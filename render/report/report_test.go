package report

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"html"
	"image"
	"image/color"
	"image/png"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"heedmap/explain"
	"heedmap/explain/measure"
)

// User-supplied strings an attacker or a careless export could put in a
// manifest: an image id that is markup, a class label with quotes and
// ampersands, and an artefact category with markup and quotes.
const (
	hostile         = `<script>alert(1)</script>`
	hostileLabel    = `naevus "atypical" & co's <b>bold</b>`
	hostileArtefact = `pen "ink" & <i>dye</i>`
)

// syntheticReport builds a small report from invented data: 64×64 maps
// with a round lesion, a Gaussian blob of relevance placed on or off it,
// and ruler/ink masks on some images. dir, when not "", receives the panel
// PNGs the HTML links to.
func syntheticReport(t testing.TB, dir string) *Report {
	t.Helper()
	const n = 64
	methods := []string{measure.MethodOcclusion, measure.MethodIntegratedGradients, measure.MethodSmoothGrad}
	var recs []ImageRecord
	for i := 0; i < 14; i++ {
		lesion := make([]bool, n*n)
		cx, cy := 32.0, 32.0
		for p := range lesion {
			x, y := float64(p%n), float64(p/n)
			lesion[p] = math.Hypot(x-cx, y-cy) <= 12
		}
		ruler := make([]bool, n*n)
		ink := make([]bool, n*n)
		for p := range ruler {
			ruler[p] = i%3 == 0 && p/n >= 56
			ink[p] = i%4 == 1 && p%n < 6
		}
		masks := measure.Masks{W: n, H: n, Lesion: lesion, Artefacts: map[string][]bool{"ruler": ruler, "ink": ink}}
		if i%5 == 2 {
			masks.Artefacts[hostileArtefact] = ruler
		}
		if i == 13 {
			masks.Lesion = make([]bool, n*n) // an empty mask: undefined inside mass
		}
		pl, err := measure.NewPlan(masks, measure.DefaultParams())
		if err != nil {
			t.Fatal(err)
		}
		id := "img" + string(rune('a'+i))
		if i == 5 {
			id = hostile
		}
		classes := []string{"melanoma", "naevus"}
		if i == 7 || i == 8 {
			classes[1] = hostileLabel
		}
		rec := ImageRecord{
			Image: measure.Image{ID: id, TrueClass: classes[i%2], PredClass: classes[(i/3)%2], Score: 0.5 + 0.035*float64(i)},
			File:  "images/" + id + ".png",
			Panel: "panels/" + id + ".png",
		}
		for mi, m := range methods {
			// Blob centre moves off the lesion as i grows.
			bx, by := 32+2.2*float64(i)+float64(mi), 32+1.4*float64(i)
			mp := explain.Map{W: n, H: n, Data: make([]float32, n*n)}
			for p := range mp.Data {
				x, y := float64(p%n), float64(p/n)
				v := math.Exp(-(sq(x-bx) + sq(y-by)) / (2 * 36))
				if ruler[p] {
					v += 0.3
				}
				if mi == 2 {
					v = -v // SmoothGrad convention: absolute value
				}
				mp.Data[p] = float32(v)
			}
			res, err := pl.Measure(m, mp)
			if err != nil {
				t.Fatal(err)
			}
			rec.Results = append(rec.Results, res)
		}
		if dir != "" {
			writePanel(t, filepath.Join(dir, "panels", "panel"+string(rune('a'+i))+".png"), i)
			rec.Panel = "panels/panel" + string(rune('a'+i)) + ".png"
		}
		recs = append(recs, rec)
	}
	imgs := make([]measure.Image, len(recs))
	for i := range recs {
		imgs[i] = recs[i].Image
	}
	sum, err := measure.Summarize(context.Background(), imgs, measure.DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	cs, err := measure.ParseCriteria([]byte("criteria:\n  - id: occlusion-median\n    method: occlusion\n    statistic: median_inside_mass_lower95\n    compare: \">=\"\n    threshold: 0.3\n  - id: flagged\n    method: integrated-gradients\n    statistic: flagged_rate\n    compare: \"<=\"\n    threshold: 0.99\n"), "accept.yaml")
	if err != nil {
		t.Fatal(err)
	}
	vs, err := measure.Evaluate(cs, sum, "accept.yaml")
	if err != nil {
		t.Fatal(err)
	}
	vs[1].ID = hostileLabel
	prov := NewProvenance(time.Date(2026, 1, 2, 3, 4, 5, 0, time.UTC))
	prov.End = prov.Start.Add(95 * time.Second)
	prov.Model = FileDigest{Path: "models/synthetic.onnx", SHA256: HashBytes([]byte("model")), Bytes: 5}
	prov.Seeds["bootstrap"] = 1
	prov.Measure = measure.DefaultParams()
	prov.ConfigSHA256 = HashBytes([]byte("{}"))
	return &Report{
		Title: "Synthetic rendering check " + hostileLabel, Provenance: prov, Images: recs, Summary: sum,
		Failures:     []Failure{{File: "images/broken " + hostile + ".png", Stage: "decode", Reason: "unexpected EOF"}},
		CriteriaFile: "accept.yaml", Verdicts: vs,
	}
}

func sq(x float64) float64 { return x * x }

func writePanel(t testing.TB, path string, seed int) {
	t.Helper()
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		t.Fatal(err)
	}
	img := image.NewRGBA(image.Rect(0, 0, 320, 160))
	for y := 0; y < 160; y++ {
		for x := 0; x < 320; x++ {
			img.Set(x, y, color.RGBA{uint8(x * 255 / 320), uint8(y * 255 / 160), uint8(40 * seed), 255})
		}
	}
	var b bytes.Buffer
	if err := png.Encode(&b, img); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, b.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
}

func TestCSV(t *testing.T) {
	r := syntheticReport(t, "")
	var b bytes.Buffer
	if err := WriteCSV(&b, r); err != nil {
		t.Fatal(err)
	}
	rows, err := csv.NewReader(&b).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(rows) != 1+14*3 {
		t.Fatalf("%d rows, want header + 42", len(rows))
	}
	head := rows[0]
	docs := ColumnDocs()
	for i, c := range docs[:len(docs)-1] {
		if head[i] != c.Name || c.Unit == "" || c.Doc == "" {
			t.Errorf("column %d: header %q, doc %+v", i, head[i], c)
		}
	}
	// Category names are sorted and survive CSV quoting exactly.
	if got := strings.Join(head[len(docs)-1:], "|"); got != "artefact_ink_mass|artefact_"+hostileArtefact+"_mass|artefact_ruler_mass" {
		t.Errorf("artefact columns %q", got)
	}
	col := map[string]int{}
	for i, h := range head {
		col[h] = i
	}
	// Row for the empty-mask image: inside mass empty with a reason.
	last := rows[len(rows)-1]
	if last[col["inside_mass"]] != "" || !strings.Contains(last[col["undefined_reason"]], "lesion mask is empty") {
		t.Errorf("undefined row: inside %q reason %q", last[col["inside_mass"]], last[col["undefined_reason"]])
	}
	// A defined row agrees with the record.
	first := rows[1]
	// Image a has no ink annotation: its ink mass is undefined, with reason.
	if first[col["inside_mass"]] == "" || first[col["method"]] != "occlusion" || first[col["artefact_ink_mass"]] != "" ||
		first[col["undefined_reason"]] != "artefact_ink_mass: artefact mask is empty" || first[col["flagged"]] != "1" {
		t.Errorf("first row %v", first)
	}
	if strings.Contains(b.String(), "NaN") {
		t.Error("NaN in CSV")
	}
}

func TestJSON(t *testing.T) {
	r := syntheticReport(t, "")
	var b bytes.Buffer
	if err := WriteJSON(&b, r); err != nil {
		t.Fatal(err)
	}
	var doc map[string]any
	if err := json.Unmarshal(b.Bytes(), &doc); err != nil {
		t.Fatal(err)
	}
	if doc["schema"] != Schema || doc["caution"] != Caution {
		t.Errorf("schema %v caution %v", doc["schema"], doc["caution"])
	}
	prov := doc["provenance"].(map[string]any)
	for _, k := range []string{"tool", "version", "go", "os", "arch", "cpu", "start", "end", "model", "images", "masks", "config_sha256", "seeds", "methods", "measure"} {
		if _, ok := prov[k]; !ok {
			t.Errorf("provenance lacks %q", k)
		}
	}
	if !strings.Contains(b.String(), `"inside_mass": {`+"\n"+`            "value": null,`) {
		t.Error("undefined inside mass not encoded as null")
	}
	// Round trip of the typed records.
	var back struct {
		Images []ImageRecord `json:"images"`
	}
	if err := json.Unmarshal(b.Bytes(), &back); err != nil {
		t.Fatal(err)
	}
	if len(back.Images) != 14 || back.Images[13].Results[0].InsideMass.OK || back.Images[0].Results[0].InsideMass != r.Images[0].Results[0].InsideMass {
		t.Error("records do not round-trip")
	}
}

func TestHTMLEscapes(t *testing.T) {
	r := syntheticReport(t, "")
	var b bytes.Buffer
	if err := WriteHTML(&b, r); err != nil {
		t.Fatal(err)
	}
	s := b.String()
	if strings.Contains(s, `<script>alert`) {
		t.Error("user-supplied string reached the page unescaped")
	}
	if !strings.Contains(s, "&lt;script&gt;alert(1)&lt;/script&gt;") {
		t.Error("escaped form of the hostile ID missing")
	}
	// The page's own script is the only one, and no user string opened an
	// element or an attribute.
	if n := strings.Count(s, "<script"); n != 1 {
		t.Errorf("%d script elements, want 1 (the sorting script)", n)
	}
	for _, raw := range []string{hostileLabel, hostileArtefact, "<b>bold", "<i>dye", `"atypical"`, `"ink"`, "& co", "javascript:"} {
		if strings.Contains(s, raw) {
			t.Errorf("raw %q reached the page", raw)
		}
	}
	// ...yet every string is shown, escaped: in text, attributes, table
	// cells, plot labels and the title.
	plain := html.UnescapeString(s)
	for _, shown := range []string{hostile, hostileLabel, hostileArtefact} {
		if strings.Count(plain, shown) < 2 {
			t.Errorf("%q is not shown on the page", shown)
		}
	}
	for _, want := range []string{Caution, `id="image-table"`, "<svg", "Acceptance verdicts", "Arras", "Wilson", "Zhang"} {
		if !strings.Contains(s, want) {
			t.Errorf("page lacks %q", want)
		}
	}
	// Summary and verdicts come before the plots and gallery.
	if strings.Index(s, `id="verdicts"`) > strings.Index(s, `id="plots"`) || strings.Index(s, `id="summary"`) > strings.Index(s, `id="gallery"`) {
		t.Error("verdicts and summary are not first")
	}
	// No external resources: the page must work offline.
	for _, bad := range []string{"http://", "https://", "<link "} {
		if i := strings.Index(s, bad); i >= 0 && !strings.Contains(s[max(0, i-30):i+40], "w3.org/2000/svg") {
			t.Errorf("page refers to an external resource near %q", s[max(0, i-30):min(len(s), i+40)])
		}
	}
}

func TestAtomicWrite(t *testing.T) {
	dir := t.TempDir()
	p := filepath.Join(dir, "report.json")
	if err := os.WriteFile(p, []byte("old"), 0o644); err != nil {
		t.Fatal(err)
	}
	boom := errors.New("disk on fire")
	err := WriteFileAtomic(p, func(w io.Writer) error {
		io.WriteString(w, "half")
		return boom
	})
	if !errors.Is(err, boom) {
		t.Errorf("error %v", err)
	}
	if b, _ := os.ReadFile(p); string(b) != "old" {
		t.Errorf("failed write changed the file to %q", b)
	}
	if err := WriteFileAtomic(p, func(w io.Writer) error { _, err := io.WriteString(w, "new"); return err }); err != nil {
		t.Fatal(err)
	}
	if b, _ := os.ReadFile(p); string(b) != "new" {
		t.Errorf("file is %q", b)
	}
	ents, _ := os.ReadDir(dir)
	if len(ents) != 1 {
		t.Errorf("temporary files left: %v", ents)
	}
}

func TestWriteAll(t *testing.T) {
	dir := t.TempDir()
	r := syntheticReport(t, dir)
	if err := WriteAll(dir, r); err != nil {
		t.Fatal(err)
	}
	for _, f := range []string{"metrics.csv", "report.json", "report.html"} {
		if fi, err := os.Stat(filepath.Join(dir, f)); err != nil || fi.Size() == 0 {
			t.Errorf("%s: %v", f, err)
		}
	}
	if err := WriteAll(filepath.Join(dir, "missing"), r); err == nil {
		t.Error("missing directory accepted")
	}
}

func TestProvenance(t *testing.T) {
	p := NewProvenance(time.Now())
	if p.Go == "" || p.OS == "" || p.Arch == "" || p.CPUs < 1 || p.Version == "" {
		t.Errorf("%+v", p)
	}
	f := filepath.Join(t.TempDir(), "x")
	os.WriteFile(f, []byte("abc"), 0o644)
	d, err := HashFile(f)
	// SHA-256("abc") from FIPS 180-2, Appendix B.1.
	if err != nil || d.SHA256 != "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad" || d.Bytes != 3 {
		t.Errorf("%+v %v", d, err)
	}
	if _, err := HashFile(f + "-missing"); err == nil {
		t.Error("missing file hashed")
	}
}

// HashInputs records every image, lesion mask and artefact mask once, with
// its role, and refuses a file it cannot read. SHA-256("abc") is the FIPS
// 180-2 Appendix B.1 value; SHA-256 of the empty string is FIPS 180-4's
// well-known e3b0c442... (common practice).
func TestHashInputs(t *testing.T) {
	dir := t.TempDir()
	write := func(name, body string) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
			t.Fatal(err)
		}
		return p
	}
	a, e, m, ru := write("a.png", "abc"), write("e.png", ""), write("m.png", "abc"), write("r.png", "abc")
	r := &Report{Images: []ImageRecord{
		{File: a, MaskFile: m, ArtefactFiles: map[string]string{"ruler": ru}},
		{File: e, MaskFile: m, ArtefactFiles: map[string]string{"ruler": ru, "ink": ""}},
	}}
	if err := r.HashInputs(); err != nil {
		t.Fatal(err)
	}
	const abc = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
	const empty = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
	p := r.Provenance
	if len(p.Images) != 2 || p.Images[0].SHA256 != abc || p.Images[1].SHA256 != empty || p.Images[1].Bytes != 0 {
		t.Errorf("images %+v", p.Images)
	}
	if len(p.Masks) != 2 || p.Masks[0].Role != "lesion" || p.Masks[1].Role != "artefact:ruler" || p.Masks[1].SHA256 != abc {
		t.Errorf("masks %+v", p.Masks)
	}
	r.Images[1].MaskFile = filepath.Join(dir, "gone.png")
	if err := r.HashInputs(); err == nil || !strings.Contains(err.Error(), "gone.png") {
		t.Errorf("missing mask: %v", err)
	}
}

// Per-category flag thresholds are part of the flag rule the reader sees.
func TestHTMLShowsPerCategoryThresholds(t *testing.T) {
	r := syntheticReport(t, "")
	r.Summary.Options.ArtefactThresholds = map[string]float64{"ruler": 0.06}
	var b bytes.Buffer
	if err := WriteHTML(&b, r); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "0.06 on ruler") {
		t.Error("per-category threshold missing from the flag rule")
	}
}
