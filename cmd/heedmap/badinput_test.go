package main

import (
	"bytes"
	"crypto/sha256"
	"encoding/csv"
	"encoding/hex"
	"encoding/json"
	"image"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"heedmap/explain/measure"
	"heedmap/synth"
)

func writeGray(t *testing.T, path string, w, h int, v uint8) {
	t.Helper()
	m := image.NewGray(image.Rect(0, 0, w, h))
	for i := range m.Pix {
		m.Pix[i] = v
	}
	var b bytes.Buffer
	png.Encode(&b, m)
	if err := os.WriteFile(path, b.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
}

// readRows reads a CSV written by a run into id → column → value.
func readRows(t *testing.T, path string) map[string]map[string]string {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	all, err := csv.NewReader(f).ReadAll()
	if err != nil || len(all) < 1 {
		t.Fatalf("%s: %v", path, err)
	}
	out := map[string]map[string]string{}
	for _, row := range all[1:] {
		m := map[string]string{}
		for i, h := range all[0] {
			m[h] = row[i]
		}
		out[row[0]] = m
	}
	return out
}

// Every kind of bad input the batch must survive, through the real
// pipeline and the demo model: each gets an error record that names the
// file and the reason, the good image is processed, and the exit status is
// 0 because something succeeded.
func TestBadInputsRealPipeline(t *testing.T) {
	dir := t.TempDir()
	data := filepath.Join(dir, "data")
	if err := synth.WriteDataset(data, 2, synth.Options{Size: 64, Seed: 41, Rates: map[string][2]float64{synth.Ruler: {1, 1}}}); err != nil {
		t.Fatal(err)
	}
	img1 := filepath.Join(data, "images", "syn00001.png")
	full, _ := os.ReadFile(img1)
	os.WriteFile(filepath.Join(data, "truncated.png"), full[:len(full)/2], 0o644) // header intact, pixels cut
	os.Mkdir(filepath.Join(data, "folder.png"), 0o755)                            // a path that cannot be read as a file
	writeGray(t, filepath.Join(data, "empty_mask.png"), 64, 64, 0)
	writeGray(t, filepath.Join(data, "small_ruler.png"), 32, 32, 255)
	writeGray(t, filepath.Join(data, "small_mask.png"), 32, 32, 255)
	man := filepath.Join(data, "bad.csv")
	os.WriteFile(man, []byte("id,image,mask,label,artifact:ruler\n"+
		"good,images/syn00000.png,masks/syn00000.png,1,artefacts/ruler/syn00000.png\n"+
		"truncated,truncated.png,masks/syn00001.png,1,\n"+
		"folder,folder.png,masks/syn00001.png,1,\n"+
		"emptymask,images/syn00001.png,empty_mask.png,1,\n"+
		"nomask,images/syn00001.png,,1,\n"+
		"missingmask,images/syn00001.png,masks/none.png,1,\n"+
		"badruler,images/syn00001.png,masks/syn00001.png,1,small_ruler.png\n"+
		"smallmask,images/syn00000.png,small_mask.png,1,\n"), 0o644)
	model := filepath.Join(dir, "m.onnx")
	os.WriteFile(model, demoShortcut, 0o644)
	base := []string{"run", "--model", model, "--config", "../../testdata/demo/demo.yaml", "--methods", "grad-cam", "--workers", "2"}
	out := filepath.Join(dir, "out")
	code, _, stderr := runCLI(t, append(base, "--images", man, "--out", out)...)
	if code != exitOK {
		t.Fatalf("exit %d, want 0 (one image succeeded)\n%s", code, stderr)
	}
	rows := readRows(t, filepath.Join(out, "images.csv"))
	want := map[string][]string{
		"truncated":   {"truncated.png", "cannot decode image"},
		"folder":      {"folder.png", "is a directory"},
		"emptymask":   {"empty_mask.png", "is empty (no lesion pixel)"},
		"nomask":      {"syn00001.png", "missing mask"},
		"missingmask": {"none.png", "no such file"},
		"badruler":    {"small_ruler.png", "is 32×32 but image"},
		"smallmask":   {"small_mask.png", "is 32×32 but image"},
	}
	if rows["good"]["status"] != "ok" {
		t.Errorf("good image: %v", rows["good"])
	}
	for id, w := range want {
		r := rows[id]
		if r["status"] != "error" || !strings.Contains(r["error"], w[0]) || !strings.Contains(r["error"], w[1]) {
			t.Errorf("%s: status %q error %q, want the file %q and %q", id, r["status"], r["error"], w[0], w[1])
		}
	}
	var sum struct{ OK, Failed int }
	b, _ := os.ReadFile(filepath.Join(out, "summary.json"))
	json.Unmarshal(b, &sum)
	if sum.OK != 1 || sum.Failed != len(want) {
		t.Errorf("summary %s", b)
	}
	rep, _ := os.ReadFile(filepath.Join(out, "report.json"))
	for _, w := range want {
		if !bytes.Contains(rep, []byte(w[1])) {
			t.Errorf("report.json does not list the failure %q", w[1])
		}
	}

	// --mask-resize accepts the 32×32 masks (nearest neighbour).
	out2 := filepath.Join(dir, "resized")
	man2 := filepath.Join(data, "resize.csv")
	os.WriteFile(man2, []byte("id,image,mask,label,artifact:ruler\nbadruler,images/syn00001.png,masks/syn00001.png,1,small_ruler.png\nsmallmask,images/syn00000.png,small_mask.png,1,\n"), 0o644)
	if code, _, e := runCLI(t, append(base, "--images", man2, "--out", out2, "--mask-resize")...); code != exitOK {
		t.Fatalf("--mask-resize: exit %d\n%s", code, e)
	}
	rows = readRows(t, filepath.Join(out2, "images.csv"))
	// An all-ones ruler mask covers the whole picture, so all of the map is on it.
	if rows["smallmask"]["status"] != "ok" || rows["badruler"]["grad-cam.artifact_mass:ruler"] != "1" {
		t.Errorf("--mask-resize rows %v", rows)
	}

	// The memory cap: 64×64 = 4096 px over a 0.002 MP cap is reduced 2×
	// (⌈64/2⌉² = 1024 ≤ 2000); over a 0.001 MP cap it is more than 4× the
	// cap and is refused without decoding.
	one := filepath.Join(data, "one.csv")
	os.WriteFile(one, []byte("id,image,mask,label\ngood,images/syn00000.png,masks/syn00000.png,1\n"), 0o644)
	out3 := filepath.Join(dir, "capped")
	if code, _, e := runCLI(t, append(base, "--images", one, "--out", out3, "--max-megapixels", "0.002")...); code != exitOK {
		t.Fatalf("cap 0.002: exit %d\n%s", code, e)
	}
	if r := readRows(t, filepath.Join(out3, "images.csv"))["good"]; r["status"] != "ok" || r["reduced"] != "64x64 reduced 2x to 32x32 for the memory cap" {
		t.Errorf("reduced image row %v", r)
	}
	out4 := filepath.Join(dir, "refused")
	if code, _, _ := runCLI(t, append(base, "--images", one, "--out", out4, "--max-megapixels", "0.001")...); code != exitFailed {
		t.Errorf("cap 0.001: exit %d, want 1 (nothing succeeded)", code)
	}
	if r := readRows(t, filepath.Join(out4, "images.csv"))["good"]; r["status"] != "error" || !strings.Contains(r["error"], "syn00000.png: 64×64 pixels") || !strings.Contains(r["error"], "more than 4× the memory cap") {
		t.Errorf("refused image row %v", r)
	}

	// A model whose output is not finite: a standard deviation of 1e-45
	// turns every input value into ±Inf, and the convolutions into NaN.
	out5 := filepath.Join(dir, "nan")
	if code, _, _ := runCLI(t, append(base, "--images", one, "--out", out5, "--std", "1e-45")...); code != exitFailed {
		t.Errorf("NaN model: exit %d, want 1", code)
	}
	if r := readRows(t, filepath.Join(out5, "images.csv"))["good"]; r["status"] != "error" || !strings.Contains(r["error"], "syn00000.png: model output 0 is NaN") {
		t.Errorf("NaN row %v", r)
	}

	// report.json carries the SHA-256 of every input it measured.
	var r struct {
		Provenance struct {
			Images, Masks []struct{ Path, Role, SHA256 string }
		}
	}
	json.Unmarshal(rep, &r)
	if len(r.Provenance.Images) != 1 || len(r.Provenance.Masks) != 2 {
		t.Fatalf("provenance %+v", r.Provenance)
	}
	for _, d := range append(r.Provenance.Images, r.Provenance.Masks...) {
		b, _ := os.ReadFile(d.Path)
		s := sha256.Sum256(b)
		if hex.EncodeToString(s[:]) != d.SHA256 {
			t.Errorf("%s: digest %s", d.Path, d.SHA256)
		}
	}
}

// renderMetrics: a measured map with no off-lesion hot region prints
// "none" (OffLesion 0), an unmeasured one "n/a" (NaN).
func TestRenderMetricsOffLesion(t *testing.T) {
	none := renderMetrics(measure.Result{HotThreshold: measure.Num(0.3)})
	if none.OffLesion != 0 || none.OffLesionBox != 0 {
		t.Errorf("measured, no region: %+v", none)
	}
	na := renderMetrics(measure.Result{HotThreshold: measure.Undef("no relevance")})
	if !math.IsNaN(na.OffLesion) {
		t.Errorf("unmeasured: %+v", na)
	}
	hot := renderMetrics(measure.Result{HotThreshold: measure.Num(0.3), HotRegions: []measure.Region{{Mass: 0.25}}})
	if hot.OffLesion != 0.25 || hot.OffLesionBox != 1 {
		t.Errorf("one region: %+v", hot)
	}
}

// The share of the lesion the model never saw, against the geometry of a
// centre crop: a 96×64 picture cropped to 64×64 loses 16 columns on each
// side, and a lesion mask covering columns 0–31 loses columns 0–15, half of
// its pixels.
func TestLesionUnseenUnderCrop(t *testing.T) {
	dir := t.TempDir()
	pic := image.NewRGBA(image.Rect(0, 0, 96, 64))
	for i := range pic.Pix {
		pic.Pix[i] = uint8(60 + i%97)
	}
	var b bytes.Buffer
	png.Encode(&b, pic)
	os.WriteFile(filepath.Join(dir, "wide.png"), b.Bytes(), 0o644)
	mask := image.NewGray(image.Rect(0, 0, 96, 64))
	for y := 0; y < 64; y++ {
		for x := 0; x < 32; x++ {
			mask.Pix[y*96+x] = 255
		}
	}
	b.Reset()
	png.Encode(&b, mask)
	os.WriteFile(filepath.Join(dir, "wide_mask.png"), b.Bytes(), 0o644)
	os.WriteFile(filepath.Join(dir, "m.csv"), []byte("id,image,mask\nwide,wide.png,wide_mask.png\n"), 0o644)
	model := filepath.Join(dir, "m.onnx")
	os.WriteFile(model, demoShortcut, 0o644)
	out := filepath.Join(dir, "out")
	if code, _, e := runCLI(t, "run", "--model", model, "--config", "../../testdata/demo/demo.yaml", "--methods", "grad-cam",
		"--resize", "crop", "--images", filepath.Join(dir, "m.csv"), "--out", out); code != exitOK {
		t.Fatalf("exit %d\n%s", code, e)
	}
	var r struct {
		Images []struct {
			Results []struct {
				Unseen measure.Value `json:"lesion_unseen_fraction"`
			} `json:"results"`
		} `json:"images"`
	}
	data, _ := os.ReadFile(filepath.Join(out, "report.json"))
	if err := json.Unmarshal(data, &r); err != nil || len(r.Images) != 1 || len(r.Images[0].Results) != 1 {
		t.Fatalf("report.json: %v", err)
	}
	if v, ok := r.Images[0].Results[0].Unseen.Float(); !ok || v != 0.5 {
		t.Errorf("lesion unseen %+v, want 0.5", r.Images[0].Results[0].Unseen)
	}
}
