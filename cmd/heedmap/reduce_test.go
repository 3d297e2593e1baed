package main

import (
	"image"
	_ "image/png"
	"path/filepath"
	"testing"
)

func decodePNG(t *testing.T, path string) image.Image {
	t.Helper()
	img, err := decodeFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return img
}

// The memory cap's reduction against Pillow's Image.reduce, the same box
// rule (goldens by testdata/reduce/make_golden.py). The 11×7 picture is
// divisible by none of the factors, so edge blocks are partial. Pillow
// rounds in 8 bits, heedmap in 16, hence a tolerance of one 8-bit step.
func TestBoxReduceMatchesPillow(t *testing.T) {
	src := decodePNG(t, filepath.Join("testdata", "reduce", "src.png"))
	for _, k := range []int{2, 3, 4} {
		want := decodePNG(t, filepath.Join("testdata", "reduce", "reduce"+string(rune('0'+k))+".png"))
		got := boxReduce(src, k)
		if got.Bounds().Size() != want.Bounds().Size() {
			t.Fatalf("k=%d: size %v, Pillow %v", k, got.Bounds().Size(), want.Bounds().Size())
		}
		for y := 0; y < got.Bounds().Dy(); y++ {
			for x := 0; x < got.Bounds().Dx(); x++ {
				g := got.RGBA64At(x, y)
				r, gg, b, _ := want.At(x, y).RGBA()
				for c, pair := range [][2]uint32{{uint32(g.R), r}, {uint32(g.G), gg}, {uint32(g.B), b}} {
					d := int(pair[0]>>8) - int(pair[1]>>8)
					if d < -1 || d > 1 {
						t.Errorf("k=%d (%d,%d) channel %d: %d, Pillow %d", k, x, y, c, pair[0]>>8, pair[1]>>8)
					}
				}
			}
		}
	}
}

// reduceFactor is the smallest k with ⌈w/k⌉·⌈h/k⌉ within the cap.
func TestReduceFactor(t *testing.T) {
	for _, c := range []struct{ w, h, limit, k int }{
		{6000, 4000, 25_000_000, 1}, // 24 MP under the default cap
		{8000, 6000, 25_000_000, 2}, // 48 MP → 4000×3000
		{64, 64, 2000, 2},           // 32² = 1024
		{64, 64, 1000, 3},           // 22² = 484; 32² = 1024 is too many
		{100, 1, 10, 10},
		{5, 5, 0, 1}, // no cap
	} {
		if k := reduceFactor(c.w, c.h, c.limit); k != c.k {
			t.Errorf("reduceFactor(%d, %d, %d) = %d, want %d", c.w, c.h, c.limit, k, c.k)
		}
	}
}
