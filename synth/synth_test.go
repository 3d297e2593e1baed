package synth

import (
	"bytes"
	"encoding/csv"
	"os"
	"path/filepath"
	"testing"
)

// The generator is invented demo data; these tests check its contracts
// (determinism, stream independence, masks, class balance), not realism.

func TestDeterministic(t *testing.T) {
	o := Options{Size: 64}
	a, err := Generate(42, o)
	if err != nil {
		t.Fatal(err)
	}
	b, _ := Generate(42, o)
	c, _ := Generate(43, o)
	if !bytes.Equal(a.Image.Pix, b.Image.Pix) {
		t.Fatal("same seed gave different images")
	}
	if bytes.Equal(a.Image.Pix, c.Image.Pix) {
		t.Fatal("different seeds gave identical images")
	}
}

// Toggling one artefact must leave pixels away from its mask unchanged, so
// a scene can be shown with and without the artefact.
func TestArtefactToggleLeavesRestIdentical(t *testing.T) {
	for _, name := range []string{Ruler, Ink, Hair, Bubbles} {
		on := Options{Size: 96, Rates: map[string][2]float64{name: {1, 1}}}
		off := Options{Size: 96, Rates: map[string][2]float64{name: {0, 0}}}
		a, err := Generate(7, on)
		if err != nil {
			t.Fatal(err)
		}
		b, _ := Generate(7, off)
		m := a.Artefacts[name]
		if m == nil || count(m) == 0 {
			t.Fatalf("%s: forced artefact has an empty mask", name)
		}
		if _, ok := b.Artefacts[name]; ok {
			t.Fatalf("%s: present at rate 0", name)
		}
		if a.Label != b.Label || a.Malignancy != b.Malignancy {
			t.Fatalf("%s: toggling changed the lesion", name)
		}
		w := a.Image.Rect.Dx()
		changedFar := 0
		for y := 0; y < w; y++ {
			for x := 0; x < w; x++ {
				if near(m, w, x, y, 3) {
					continue
				}
				i := a.Image.PixOffset(x, y)
				if !bytes.Equal(a.Image.Pix[i:i+4], b.Image.Pix[i:i+4]) {
					changedFar++
				}
			}
		}
		if changedFar > 0 {
			t.Errorf("%s: %d pixels more than 3 px from the mask changed", name, changedFar)
		}
	}
}

func near(m []bool, w, x, y, r int) bool {
	for dy := -r; dy <= r; dy++ {
		for dx := -r; dx <= r; dx++ {
			xx, yy := x+dx, y+dy
			if xx >= 0 && yy >= 0 && xx < w && yy < w && m[yy*w+xx] {
				return true
			}
		}
	}
	return false
}

func count(m []bool) int {
	n := 0
	for _, v := range m {
		if v {
			n++
		}
	}
	return n
}

func TestLesionMaskAndClasses(t *testing.T) {
	n1 := 0
	var mal [2]float64
	var cnt [2]int
	for s := uint64(0); s < 200; s++ {
		sc, err := Generate(s, Options{Size: 48, Rates: map[string][2]float64{}})
		if err != nil {
			t.Fatal(err)
		}
		frac := float64(count(sc.Lesion)) / float64(48*48)
		if frac < 0.03 || frac > 0.6 {
			t.Fatalf("seed %d: lesion covers %.2f of the image", s, frac)
		}
		n1 += sc.Label
		mal[sc.Label] += sc.Malignancy
		cnt[sc.Label]++
	}
	if n1 < 70 || n1 > 130 {
		t.Errorf("class 1 drawn %d/200 times, want about half", n1)
	}
	if mal[1]/float64(cnt[1])-mal[0]/float64(cnt[0]) < 0.25 {
		t.Errorf("class means of the malignancy latent too close: %v %v", mal[0]/float64(cnt[0]), mal[1]/float64(cnt[1]))
	}
}

func TestRatesFollowClass(t *testing.T) {
	o := Options{Size: 32, Rates: map[string][2]float64{Ruler: {0, 1}}}
	for s := uint64(0); s < 50; s++ {
		sc, _ := Generate(s, o)
		_, has := sc.Artefacts[Ruler]
		if has != (sc.Label == 1) {
			t.Fatalf("seed %d: ruler=%v label=%d", s, has, sc.Label)
		}
	}
}

func TestBadOptions(t *testing.T) {
	for _, o := range []Options{
		{Size: 8},
		{Rates: map[string][2]float64{"sticker": {1, 1}}},
		{Rates: map[string][2]float64{Ink: {1.5, 0}}},
		{FixedLabel: true, Label: 2},
	} {
		if _, err := Generate(1, o); err == nil {
			t.Errorf("options %+v accepted", o)
		}
	}
}

func TestWriteDataset(t *testing.T) {
	dir := t.TempDir()
	o := Options{Size: 32, Seed: 5, Rates: map[string][2]float64{Ruler: {1, 1}, Hair: {0, 0}}}
	if err := WriteDataset(dir, 3, o); err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(filepath.Join(dir, "manifest.csv"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	want := []string{"id", "image", "mask", "label", "artifact:hair", "artifact:ruler"}
	if len(rows) != 4 || len(rows[0]) != len(want) {
		t.Fatalf("manifest %v", rows)
	}
	for i, h := range want {
		if rows[0][i] != h {
			t.Fatalf("header %v, want %v", rows[0], want)
		}
	}
	for _, r := range rows[1:] {
		if r[4] != "" || r[5] == "" {
			t.Errorf("row %v: hair should be empty and ruler set", r)
		}
		for _, p := range []string{r[1], r[2], r[5]} {
			if _, err := os.Stat(filepath.Join(dir, p)); err != nil {
				t.Error(err)
			}
		}
	}
}
