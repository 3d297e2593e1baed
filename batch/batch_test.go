package batch

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
)

// meanWorker is a deterministic stand-in for the attribution pipeline: it
// decodes the image, reports the mean of each channel and the mask's area
// fraction, and writes one file. Ids containing "fail" fail; "panic" panics.
type meanWorker struct {
	calls atomic.Int64
	gate  func(id string) // optional hook, called before work
}

func (w *meanWorker) Process(ctx context.Context, it Item, dst Dest) (Result, error) {
	w.calls.Add(1)
	if w.gate != nil {
		w.gate(it.ID)
	}
	if err := ctx.Err(); err != nil {
		return Result{}, err
	}
	if strings.Contains(it.ID, "panic") {
		panic("deliberate")
	}
	if strings.Contains(it.ID, "fail") {
		return Result{}, fmt.Errorf("%s: deliberate failure", it.Image)
	}
	img, err := decode(it.Image)
	if err != nil {
		return Result{}, err
	}
	b := img.Bounds()
	var s [3]float64
	for y := b.Min.Y; y < b.Max.Y; y++ {
		for x := b.Min.X; x < b.Max.X; x++ {
			r, g, bl, _ := img.At(x, y).RGBA()
			s[0] += float64(r >> 8)
			s[1] += float64(g >> 8)
			s[2] += float64(bl >> 8)
		}
	}
	n := float64(b.Dx() * b.Dy())
	res := Result{Metrics: map[string]float64{"mean_r": s[0] / n, "mean_g": s[1] / n, "mean_b": s[2] / n}, Info: map[string]string{"size": fmt.Sprint(b.Dx())}}
	if it.Mask != "" {
		m, err := decode(it.Mask)
		if err != nil {
			return Result{}, err
		}
		in := 0
		for y := b.Min.Y; y < b.Max.Y; y++ {
			for x := b.Min.X; x < b.Max.X; x++ {
				if r, _, _, _ := m.At(x, y).RGBA(); r > 0x7fff {
					in++
				}
			}
		}
		res.Metrics["mask_fraction"] = float64(in) / n
	}
	abs, rel, err := dst.Path("stats", ".txt")
	if err != nil {
		return Result{}, err
	}
	if err := WriteFileAtomic(abs, []byte(fmt.Sprintf("%v\n", res.Metrics))); err != nil {
		return Result{}, err
	}
	res.Files = []string{rel}
	res.Detail = struct {
		W, H int
	}{b.Dx(), b.Dy()}
	return res, nil
}

func decode(p string) (image.Image, error) {
	f, err := os.Open(p)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	img, _, err := image.Decode(f)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", p, err)
	}
	return img, nil
}

func writeImg(t testing.TB, path string, w, h int, seed int) {
	t.Helper()
	img := image.NewRGBA(image.Rect(0, 0, w, h))
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			img.Set(x, y, color.RGBA{uint8(x*seed + y), uint8(seed * 17), uint8(x ^ y), 255})
		}
	}
	writePNGT(t, path, img)
}

func writeMask(t testing.TB, path string, w, h int) {
	t.Helper()
	g := image.NewGray(image.Rect(0, 0, w, h))
	for i := range g.Pix {
		if i%3 == 0 {
			g.Pix[i] = 255
		}
	}
	writePNGT(t, path, g)
}

func writePNGT(t testing.TB, path string, img image.Image) {
	t.Helper()
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		t.Fatal(err)
	}
	var buf bytes.Buffer
	if err := png.Encode(&buf, img); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
}

// folderSet writes n good images with masks (suffix "_seg").
func folderSet(t testing.TB, dir string, n int) Input {
	for i := 0; i < n; i++ {
		id := fmt.Sprintf("img%03d", i)
		writeImg(t, filepath.Join(dir, "images", id+".png"), 12, 10, i+1)
		writeMask(t, filepath.Join(dir, "masks", id+"_seg.png"), 12, 10)
	}
	return Input{Images: filepath.Join(dir, "images"), Masks: filepath.Join(dir, "masks"), MaskSuffix: "_seg"}
}

func plan(t testing.TB, in Input, shard Shard) *Plan {
	t.Helper()
	items, probs, err := Discover(in)
	if err != nil {
		t.Fatal(err)
	}
	p, err := Validate(context.Background(), items, probs, shard, "fp-test", Checks{Workers: 2})
	if err != nil {
		t.Fatal(err)
	}
	return p
}

func run(t testing.TB, out string, p *Plan, w Worker) Summary {
	t.Helper()
	s, err := (&Runner{Out: out, Worker: w, Workers: 2}).Run(context.Background(), p)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func readFile(t testing.TB, p string) []byte {
	t.Helper()
	b, err := os.ReadFile(p)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func TestDiscoverFolderPairsMasksBySuffix(t *testing.T) {
	dir := t.TempDir()
	in := folderSet(t, dir, 3)
	writeImg(t, filepath.Join(dir, "images", "lonely.png"), 12, 10, 9)
	os.WriteFile(filepath.Join(dir, "images", "notes.txt"), []byte("x"), 0o644)
	items, probs, err := Discover(in)
	if err != nil {
		t.Fatal(err)
	}
	if len(items) != 4 {
		t.Fatalf("got %d items, want 4 (txt ignored)", len(items))
	}
	for _, it := range items {
		if it.ID == "lonely" {
			if it.Mask != "" {
				t.Error("lonely got a mask")
			}
			continue
		}
		if filepath.Base(it.Mask) != it.ID+"_seg.png" {
			t.Errorf("%s paired with %q", it.ID, it.Mask)
		}
	}
	if len(probs) != 0 {
		t.Errorf("problems %v, want none (a missing mask is the item's own error)", probs)
	}
	for _, it := range items {
		if (it.ID == "lonely") != strings.Contains(it.Problem, "lonely.png: missing mask: no lonely_seg.png") {
			t.Errorf("%s: problem %q", it.ID, it.Problem)
		}
	}
}

// Artefact masks in DIR/CATEGORY/STEM.png pair with images like lesion
// masks; a category folder without the image's file means "absent".
func TestDiscoverArtefactFolders(t *testing.T) {
	dir := t.TempDir()
	in := folderSet(t, dir, 3)
	in.Artefacts = filepath.Join(dir, "arts")
	writeMask(t, filepath.Join(in.Artefacts, "ruler", "img001_seg.png"), 12, 10)
	writeMask(t, filepath.Join(in.Artefacts, "ink", "img002_seg.png"), 12, 10)
	items, _, err := Discover(in)
	if err != nil {
		t.Fatal(err)
	}
	want := map[string]map[string]string{
		"img000": {"ruler": "", "ink": ""},
		"img001": {"ruler": filepath.Join(in.Artefacts, "ruler", "img001_seg.png"), "ink": ""},
		"img002": {"ruler": "", "ink": filepath.Join(in.Artefacts, "ink", "img002_seg.png")},
	}
	for _, it := range items {
		if fmt.Sprint(it.Artefacts) != fmt.Sprint(want[it.ID]) {
			t.Errorf("%s: artefacts %v, want %v", it.ID, it.Artefacts, want[it.ID])
		}
	}
	in.Artefacts = filepath.Join(dir, "images") // no category folders
	if _, _, err := Discover(in); err == nil || !strings.Contains(err.Error(), "no category subfolders") {
		t.Errorf("artefacts folder without categories: %v", err)
	}
}

func TestManifest(t *testing.T) {
	src := "id,image,mask,label,artifact:ruler,extra\n" +
		"b,imgs/b.png,m/b.png,1,art/b.png,z\n" +
		"a,/abs/a.png,,0,,z\n" +
		"a,imgs/a2.png,,0,,z\n" +
		",imgs/c.png,,,,\n"
	items, probs, err := ReadManifest(strings.NewReader(src), "/data")
	if err != nil {
		t.Fatal(err)
	}
	if len(items) != 2 || items[0].ID != "a" || items[1].ID != "b" {
		t.Fatalf("items %+v", items)
	}
	if items[0].Image != "/abs/a.png" || items[1].Image != filepath.Join("/data", "imgs/b.png") {
		t.Errorf("paths not resolved against the manifest folder: %q %q", items[0].Image, items[1].Image)
	}
	if items[1].Artefacts["ruler"] != filepath.Join("/data", "art/b.png") || items[0].Artefacts["ruler"] != "" {
		t.Errorf("artefacts %v %v", items[0].Artefacts, items[1].Artefacts)
	}
	var text []string
	for _, p := range probs {
		text = append(text, p.String())
	}
	all := strings.Join(text, "\n")
	for _, want := range []string{"extra", "duplicate id", "empty id"} {
		if !strings.Contains(all, want) {
			t.Errorf("problems lack %q:\n%s", want, all)
		}
	}
	if _, _, err := ReadManifest(strings.NewReader("id,mask\nx,y\n"), "."); err == nil {
		t.Error("manifest without image column accepted")
	}
}

// Bad input never stops the batch: each bad image gets an error record that
// names the file, and the good ones are processed.
func TestBadInputsRecorded(t *testing.T) {
	dir := t.TempDir()
	in := folderSet(t, dir, 3)
	imgs := in.Images
	os.WriteFile(filepath.Join(imgs, "corrupt.png"), []byte("not a png"), 0o644)
	writeImg(t, filepath.Join(imgs, "wrongmask.png"), 12, 10, 4)
	writeMask(t, filepath.Join(in.Masks, "wrongmask_seg.png"), 5, 5)
	writeImg(t, filepath.Join(imgs, "will-fail.png"), 12, 10, 5)
	writeMask(t, filepath.Join(in.Masks, "will-fail_seg.png"), 12, 10)
	writeImg(t, filepath.Join(imgs, "will-panic.png"), 12, 10, 6)
	writeMask(t, filepath.Join(in.Masks, "will-panic_seg.png"), 12, 10)
	writeImg(t, filepath.Join(imgs, "nomask.png"), 12, 10, 7)
	// An artefact mask of the wrong size is an error naming the file.
	in.Artefacts = filepath.Join(dir, "arts")
	writeImg(t, filepath.Join(imgs, "badruler.png"), 12, 10, 8)
	writeMask(t, filepath.Join(in.Masks, "badruler_seg.png"), 12, 10)
	writeMask(t, filepath.Join(in.Artefacts, "ruler", "badruler_seg.png"), 6, 5)
	// A folder named like a mask cannot be read as one.
	writeImg(t, filepath.Join(imgs, "dirmask.png"), 12, 10, 9)
	os.MkdirAll(filepath.Join(in.Masks, "dirmask_seg.png"), 0o755)
	p := plan(t, in, Shard{})
	if len(p.Invalid) != 5 {
		t.Fatalf("invalid %v, want corrupt, wrongmask, nomask, badruler, dirmask", p.Invalid)
	}
	out := filepath.Join(dir, "out")
	s := run(t, out, p, &meanWorker{})
	if s.OK != 3 || s.Failed != 7 || !s.Complete {
		t.Fatalf("summary %+v, want 3 ok, 7 failed", s)
	}
	rows := string(readFile(t, filepath.Join(out, "metrics.csv")))
	for id, want := range map[string]string{
		"corrupt":    "corrupt.png: not a readable PNG",
		"wrongmask":  "is 5×5 but image",
		"will-fail":  "will-fail.png: deliberate failure",
		"will-panic": "will-panic.png: internal error",
		"nomask":     "nomask.png: missing mask: no nomask_seg.png",
		"badruler":   "artifact:ruler " + filepath.Join(in.Artefacts, "ruler", "badruler_seg.png") + " is 6×5 but image",
		"dirmask":    "missing mask",
	} {
		found := false
		for _, line := range strings.Split(rows, "\n") {
			if strings.HasPrefix(line, id+",error,") && strings.Contains(line, want) {
				found = true
			}
		}
		if !found {
			t.Errorf("no error row for %s containing %q in\n%s", id, want, rows)
		}
	}
}

func TestResumeSkipsFinishedWork(t *testing.T) {
	dir := t.TempDir()
	in := folderSet(t, dir, 6)
	out := filepath.Join(dir, "out")
	w := &meanWorker{}
	run(t, out, plan(t, in, Shard{}), w)
	first := readFile(t, filepath.Join(out, "metrics.csv"))
	if w.calls.Load() != 6 {
		t.Fatalf("first run made %d calls", w.calls.Load())
	}
	for _, r := range Records(out, mustIndex(t, out)) {
		var c bytes.Buffer
		json.Compact(&c, r.Detail)
		if c.String() != `{"W":12,"H":10}` || len(r.Files) != 1 {
			t.Fatalf("record %s: detail %s, files %v", r.ID, r.Detail, r.Files)
		}
	}
	w2 := &meanWorker{}
	s := run(t, out, plan(t, in, Shard{}), w2)
	if w2.calls.Load() != 0 || s.Skipped != 6 {
		t.Fatalf("rerun made %d calls, skipped %d", w2.calls.Load(), s.Skipped)
	}
	if !bytes.Equal(first, readFile(t, filepath.Join(out, "metrics.csv"))) {
		t.Fatal("metrics.csv changed on a no-op rerun")
	}
	// Changing one image's bytes invalidates exactly that record.
	writeImg(t, filepath.Join(in.Images, "img002.png"), 12, 10, 99)
	w3 := &meanWorker{}
	run(t, out, plan(t, in, Shard{}), w3)
	if w3.calls.Load() != 1 {
		t.Fatalf("after changing one image, %d calls", w3.calls.Load())
	}
	// A different fingerprint (model or config) redoes everything.
	items, probs, _ := Discover(in)
	p, _ := Validate(context.Background(), items, probs, Shard{}, "other-model", Checks{Workers: 1})
	w4 := &meanWorker{}
	run(t, out, p, w4)
	if w4.calls.Load() != 6 {
		t.Fatalf("new fingerprint made %d calls", w4.calls.Load())
	}
}

// Cancelling (Ctrl-C) keeps finished records; the rerun completes and gives
// the same metrics.csv as an uninterrupted run.
func TestCancelKeepsFinishedWork(t *testing.T) {
	dir := t.TempDir()
	in := folderSet(t, dir, 10)
	ref := filepath.Join(dir, "ref")
	run(t, ref, plan(t, in, Shard{}), &meanWorker{})

	out := filepath.Join(dir, "out")
	ctx, cancel := context.WithCancel(context.Background())
	var once sync.Once
	var started atomic.Int64
	w := &meanWorker{gate: func(string) {
		if started.Add(1) > 4 {
			once.Do(cancel)
		}
	}}
	s, err := (&Runner{Out: out, Worker: w, Workers: 1}).Run(ctx, plan(t, in, Shard{}))
	if !errors.Is(err, context.Canceled) {
		t.Fatalf("err %v, want context.Canceled", err)
	}
	if s.OK != 4 || s.Pending != 6 || s.Complete {
		t.Fatalf("summary after cancel %+v, want 4 ok and 6 pending", s)
	}
	w2 := &meanWorker{}
	run(t, out, plan(t, in, Shard{}), w2)
	if w2.calls.Load() != 6 {
		t.Fatalf("resume made %d calls, want 6", w2.calls.Load())
	}
	if !bytes.Equal(readFile(t, filepath.Join(ref, "metrics.csv")), readFile(t, filepath.Join(out, "metrics.csv"))) {
		t.Fatal("resumed metrics.csv differs from the uninterrupted run")
	}
}

func TestShardsPartitionAndMergeEqualsSingleRun(t *testing.T) {
	dir := t.TempDir()
	in := folderSet(t, dir, 20)
	writeImg(t, filepath.Join(in.Images, "x-fail.png"), 12, 10, 3)
	writeMask(t, filepath.Join(in.Masks, "x-fail_seg.png"), 12, 10)
	single := filepath.Join(dir, "single")
	run(t, single, plan(t, in, Shard{}), &meanWorker{})
	os.WriteFile(filepath.Join(single, "config.yaml"), []byte("a: 1\n"), 0o644)

	const n = 3
	var shardDirs []string
	seen := map[string]int{}
	for i := 0; i < n; i++ {
		d := filepath.Join(dir, fmt.Sprintf("shard-%d", i))
		p := plan(t, in, Shard{i, n})
		for _, it := range p.Items {
			seen[it.ID]++
		}
		run(t, d, p, &meanWorker{})
		os.WriteFile(filepath.Join(d, "config.yaml"), []byte("a: 1\n"), 0o644)
		shardDirs = append(shardDirs, d)
	}
	if len(seen) != 21 {
		t.Fatalf("shards covered %d of 21 ids", len(seen))
	}
	for id, c := range seen {
		if c != 1 {
			t.Fatalf("%s in %d shards", id, c)
		}
	}
	merged := filepath.Join(dir, "merged")
	rep, err := Merge(merged, shardDirs, MergeOptions{Extra: []string{"config.yaml"}})
	if err != nil {
		t.Fatal(err)
	}
	if len(rep.Missing) != 0 || !rep.Summary.Complete || rep.Summary.OK != 20 || rep.Summary.Failed != 1 {
		t.Fatalf("merge report %+v", rep)
	}
	for _, f := range []string{"metrics.csv", "index.json", "config.yaml"} {
		if !bytes.Equal(readFile(t, filepath.Join(single, f)), readFile(t, filepath.Join(merged, f))) {
			t.Errorf("merged %s differs from the single run", f)
		}
	}
	if a, b := listFiles(t, filepath.Join(single, "records")), listFiles(t, filepath.Join(merged, "records")); strings.Join(a, ",") != strings.Join(b, ",") {
		t.Errorf("record sets differ:\n%v\n%v", a, b)
	}
	if a, b := listFiles(t, filepath.Join(single, "stats")), listFiles(t, filepath.Join(merged, "stats")); len(a) == 0 || strings.Join(a, ",") != strings.Join(b, ",") {
		t.Errorf("item files differ:\n%v\n%v", a, b)
	}
	// A missing shard is reported; mixing fingerprints is refused.
	rep, err = Merge(filepath.Join(dir, "partial"), shardDirs[:2], MergeOptions{})
	if err != nil || len(rep.Missing) != 1 || rep.Summary.Complete {
		t.Errorf("partial merge: %+v, %v", rep, err)
	}
	other := filepath.Join(dir, "other")
	items, probs, _ := Discover(in)
	p, _ := Validate(context.Background(), items, probs, Shard{2, n}, "other-model", Checks{Workers: 1})
	run(t, other, p, &meanWorker{})
	if _, err := Merge(filepath.Join(dir, "bad"), []string{shardDirs[0], shardDirs[1], other}, MergeOptions{}); err == nil {
		t.Error("merge of shards with different fingerprints accepted")
	}
}

func listFiles(t testing.TB, root string) []string {
	var out []string
	filepath.Walk(root, func(p string, info os.FileInfo, err error) error {
		if err == nil && !info.IsDir() {
			r, _ := filepath.Rel(root, p)
			out = append(out, r)
		}
		return nil
	})
	sort.Strings(out)
	return out
}

// The shard of an id is FNV-1a 64 of its bytes modulo N. Reference values
// from the FNV test vectors (Fowler/Noll/Vo; value from memory, also in Go's
// hash/fnv tests): FNV-1a 64("a") = 0xaf63dc4c8601ec8c,
// FNV-1a 64("foobar") = 0x85944171f73967e8.
func TestShardAssignmentIsFNV1a(t *testing.T) {
	for _, c := range []struct {
		id string
		h  uint64
	}{{"a", 0xaf63dc4c8601ec8c}, {"foobar", 0x85944171f73967e8}} {
		for _, n := range []int{2, 3, 7, 100} {
			want := int(c.h % uint64(n))
			for i := 0; i < n; i++ {
				if got := (Shard{i, n}).Has(c.id); got != (i == want) {
					t.Errorf("Shard{%d,%d}.Has(%q) = %v, want shard %d", i, n, c.id, got, want)
				}
			}
		}
	}
}

func TestResolveShard(t *testing.T) {
	env := func(m map[string]string) func(string) string { return func(k string) string { return m[k] } }
	cases := []struct {
		flag string
		env  map[string]string
		want Shard
		err  bool
	}{
		{"", nil, Shard{}, false},
		{"1/4", map[string]string{"SLURM_ARRAY_TASK_ID": "3", "SLURM_ARRAY_TASK_COUNT": "8"}, Shard{1, 4}, false},
		{"", map[string]string{"SLURM_ARRAY_TASK_ID": "3", "SLURM_ARRAY_TASK_COUNT": "8"}, Shard{3, 8}, false},
		{"", map[string]string{"SLURM_ARRAY_TASK_ID": "5", "SLURM_ARRAY_TASK_COUNT": "4", "SLURM_ARRAY_TASK_MIN": "2"}, Shard{3, 4}, false},
		{"", map[string]string{"JOB_COMPLETION_INDEX": "2", "HEEDMAP_SHARD_COUNT": "5"}, Shard{2, 5}, false},
		{"", map[string]string{"JOB_COMPLETION_INDEX": "2"}, Shard{}, true},
		{"4/4", nil, Shard{}, true},
		{"-1/4", nil, Shard{}, true},
		{"x", nil, Shard{}, true},
	}
	for _, c := range cases {
		got, _, err := ResolveShard(c.flag, env(c.env))
		if (err != nil) != c.err || (!c.err && got != c.want) {
			t.Errorf("ResolveShard(%q, %v) = %v, %v; want %v (error %v)", c.flag, c.env, got, err, c.want, c.err)
		}
	}
}

func TestSafeName(t *testing.T) {
	ids := []string{"../../etc/x", "..", ".", "", "/abs/path", "a/b", "a_b", "a\\b", "C:x", strings.Repeat("z", 300), "ok-name_1.2"}
	seen := map[string]string{}
	for _, id := range ids {
		s := SafeName(id)
		if !filepath.IsLocal(s) || strings.ContainsAny(s, "/\\") || strings.HasPrefix(s, ".") || len(s) > 100 {
			t.Errorf("SafeName(%q) = %q is not a safe single element", id, s)
		}
		if prev, dup := seen[s]; dup {
			t.Errorf("SafeName(%q) = SafeName(%q) = %q", id, prev, s)
		}
		seen[s] = id
	}
	if SafeName("ok-name_1.2") != "ok-name_1.2" {
		t.Error("a safe id was changed")
	}
	out := t.TempDir()
	for _, c := range []struct{ name, folder, suffix string }{
		{"a", "..", ".png"}, {"a", "../x", ".png"}, {"a", "x/y", ".png"}, {"a", "/abs", ".png"}, {"a", "records", ".json"},
		{"a", "x", "/../../y"}, {"a", "x", `\..\y`}, {"..", "x", ""}, {"", "x", ".png"}, {"a/b", "x", ".png"},
	} {
		if _, _, err := (Dest{Out: out, Name: c.name}).Path(c.folder, c.suffix); err == nil {
			t.Errorf("Dest{Name: %q}.Path(%q, %q) accepted", c.name, c.folder, c.suffix)
		}
	}
	abs, rel, err := (Dest{Out: out, Name: SafeName("../a")}).Path("overlays", ".occlusion.png")
	if err != nil || rel != "overlays/"+SafeName("../a")+".occlusion.png" || abs != filepath.Join(out, filepath.FromSlash(rel)) {
		t.Errorf("Dest.Path = %q, %q, %v", abs, rel, err)
	}
}

// Ids that look like paths must not make anything appear outside OUT.
func TestHostileIDsStayInsideOutput(t *testing.T) {
	dir := t.TempDir()
	data := filepath.Join(dir, "data")
	writeImg(t, filepath.Join(data, "a.png"), 8, 8, 1)
	writeImg(t, filepath.Join(data, "b.png"), 8, 8, 2)
	man := "id,image\n../../etc/x,a.png\n/abs/y,b.png\n..,a.png\n"
	os.WriteFile(filepath.Join(data, "m.csv"), []byte(man), 0o644)
	before := listFiles(t, dir)
	out := filepath.Join(dir, "work", "out")
	s := run(t, out, plan(t, Input{Images: filepath.Join(data, "m.csv")}, Shard{}), &meanWorker{})
	if s.OK != 3 {
		t.Fatalf("summary %+v", s)
	}
	var outside []string
	have := map[string]bool{}
	for _, f := range before {
		have[f] = true
	}
	for _, f := range listFiles(t, dir) {
		if !have[f] && !strings.HasPrefix(f, filepath.Join("work", "out")+string(filepath.Separator)) {
			outside = append(outside, f)
		}
	}
	if len(outside) > 0 {
		t.Fatalf("files written outside the output folder: %v", outside)
	}
	rows := string(readFile(t, filepath.Join(out, "metrics.csv")))
	if !strings.Contains(rows, "../../etc/x,ok") {
		t.Errorf("the id is kept verbatim in the results:\n%s", rows)
	}
}

func mustIndex(t testing.TB, out string) Index {
	t.Helper()
	idx, err := ReadIndex(out)
	if err != nil {
		t.Fatal(err)
	}
	return idx
}

// A file without read permission is that image's error, naming the file.
// Root reads every file, so the test needs an ordinary user (the same
// check as root: setpriv --reuid=65534 heedmap run ...).
func TestUnreadableFileRecorded(t *testing.T) {
	if os.Geteuid() == 0 {
		t.Skip("root can read a file without read permission")
	}
	dir := t.TempDir()
	in := folderSet(t, dir, 2)
	locked := filepath.Join(in.Images, "img001.png")
	if err := os.Chmod(locked, 0); err != nil {
		t.Fatal(err)
	}
	defer os.Chmod(locked, 0o644)
	p := plan(t, in, Shard{})
	if len(p.Invalid) != 1 || !strings.Contains(p.Invalid[0].Reason, locked+": permission denied") {
		t.Fatalf("invalid %+v", p.Invalid)
	}
}
