package synth

import (
	"bufio"
	"encoding/csv"
	"fmt"
	"image"
	"image/png"
	"os"
	"path/filepath"
	"strconv"
)

// SceneSeed derives the seed of scene i of a dataset from the dataset seed
// (SplitMix64 finaliser), so neighbouring datasets do not share scenes.
func SceneSeed(base uint64, i int) uint64 {
	z := base + uint64(i+1)*0x9e3779b97f4a7c15
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// WriteDataset writes n scenes under dir:
//
//	images/ID.png               the RGB image
//	masks/ID.png                the lesion mask (8-bit grey, 0 or 255)
//	artefacts/NAME/ID.png       one mask per artefact present
//	manifest.csv                id,image,mask,label,artifact:NAME...
//
// Paths in the manifest are relative to dir; an artifact:NAME cell holds the
// mask path when the artefact is present and is empty otherwise. IDs are
// "syn" followed by a zero-padded index. Scene i uses SceneSeed(opts.Seed, i).
func WriteDataset(dir string, n int, opts Options) error {
	if n < 0 {
		return fmt.Errorf("synth: negative scene count %d", n)
	}
	rates := opts.Rates
	if rates == nil {
		rates = DefaultRates()
	}
	var names []string
	for _, nm := range Names() {
		if _, ok := rates[nm]; ok {
			names = append(names, nm)
		}
	}
	for _, sub := range []string{"images", "masks"} {
		if err := os.MkdirAll(filepath.Join(dir, sub), 0o755); err != nil {
			return err
		}
	}
	for _, nm := range names {
		if err := os.MkdirAll(filepath.Join(dir, "artefacts", nm), 0o755); err != nil {
			return err
		}
	}
	f, err := os.Create(filepath.Join(dir, "manifest.csv"))
	if err != nil {
		return err
	}
	defer f.Close()
	bw := bufio.NewWriter(f)
	w := csv.NewWriter(bw)
	head := []string{"id", "image", "mask", "label"}
	for _, nm := range names {
		head = append(head, "artifact:"+nm)
	}
	if err := w.Write(head); err != nil {
		return err
	}
	o := opts
	o.Rates = rates
	for i := 0; i < n; i++ {
		sc, err := Generate(SceneSeed(opts.Seed, i), o)
		if err != nil {
			return err
		}
		id := fmt.Sprintf("syn%05d", i)
		img := "images/" + id + ".png"
		msk := "masks/" + id + ".png"
		if err := writePNG(filepath.Join(dir, img), sc.Image); err != nil {
			return err
		}
		if err := writePNG(filepath.Join(dir, msk), MaskImage(sc.Lesion, sc.Image.Rect.Dx(), sc.Image.Rect.Dy())); err != nil {
			return err
		}
		row := []string{id, img, msk, strconv.Itoa(sc.Label)}
		for _, nm := range names {
			m, ok := sc.Artefacts[nm]
			if !ok {
				row = append(row, "")
				continue
			}
			p := "artefacts/" + nm + "/" + id + ".png"
			if err := writePNG(filepath.Join(dir, p), MaskImage(m, sc.Image.Rect.Dx(), sc.Image.Rect.Dy())); err != nil {
				return err
			}
			row = append(row, p)
		}
		if err := w.Write(row); err != nil {
			return err
		}
	}
	w.Flush()
	if err := w.Error(); err != nil {
		return err
	}
	if err := bw.Flush(); err != nil {
		return err
	}
	return f.Close()
}

// MaskImage renders a boolean mask as an 8-bit grey image, 255 where true.
func MaskImage(m []bool, w, h int) *image.Gray {
	g := image.NewGray(image.Rect(0, 0, w, h))
	for i, v := range m {
		if v {
			g.Pix[i] = 255
		}
	}
	return g
}

func writePNG(path string, img image.Image) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	if err := png.Encode(f, img); err != nil {
		f.Close()
		return fmt.Errorf("synth: encode %s: %w", path, err)
	}
	return f.Close()
}
