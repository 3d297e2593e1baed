package measure

import (
	"image"
	"image/color"
	"strings"
	"testing"
)

// The mask rule of the issue ("non-zero, or ≥ 128 for grey, = lesion"),
// checked pixel by pixel on hand-made pictures.
func TestMaskFromImage(t *testing.T) {
	g := image.NewGray(image.Rect(10, 20, 14, 21)) // non-zero origin
	for i, v := range []uint8{0, 127, 128, 255} {
		g.SetGray(10+i, 20, color.Gray{v})
	}
	m, w, h, err := MaskFromImage(g, "grey.png")
	if err != nil || w != 4 || h != 1 || m[0] || m[1] || !m[2] || !m[3] {
		t.Errorf("grey: %v %d×%d %v", m, w, h, err)
	}
	p := image.NewPaletted(image.Rect(0, 0, 3, 1), color.Palette{color.Black, color.White, color.Gray{1}})
	p.SetColorIndex(1, 0, 2) // index 2, a nearly black colour: still lesion
	if m, _, _, err := MaskFromImage(p, "pal.png"); err != nil || m[0] || !m[1] || m[2] {
		t.Errorf("palette: %v %v", m, err)
	}
	c := image.NewNRGBA(image.Rect(0, 0, 2, 1))
	c.SetNRGBA(0, 0, color.NRGBA{0, 0, 0, 255})
	c.SetNRGBA(1, 0, color.NRGBA{0, 0, 1, 255})
	if m, _, _, err := MaskFromImage(c, "rgb.png"); err != nil || m[0] || !m[1] {
		t.Errorf("colour: %v %v", m, err)
	}
	// A 0/1 label mask saved as 8-bit grey is refused with a reason.
	l := image.NewGray(image.Rect(0, 0, 2, 2))
	l.SetGray(1, 1, color.Gray{1})
	if _, _, _, err := MaskFromImage(l, "labels.png"); err == nil || !strings.Contains(err.Error(), "labels.png") || !strings.Contains(err.Error(), "128") {
		t.Errorf("0/1 grey mask: %v", err)
	}
	// An all-black grey mask is an empty lesion, not an error.
	if m, _, _, err := MaskFromImage(image.NewGray(image.Rect(0, 0, 2, 2)), "black.png"); err != nil || m[0] || m[3] {
		t.Errorf("black: %v %v", m, err)
	}
}

func TestFitMask(t *testing.T) {
	m := []bool{true, false, false, true} // 2×2 diagonal
	if _, err := FitMask(m, 2, 2, 4, 4, false, "m.png"); err == nil || !strings.Contains(err.Error(), "2×2") || !strings.Contains(err.Error(), "4×4") {
		t.Errorf("size mismatch: %v", err)
	}
	got, err := FitMask(m, 2, 2, 4, 4, true, "m.png")
	if err != nil {
		t.Fatal(err)
	}
	// Nearest neighbour by pixel centres: each source pixel becomes a 2×2 block.
	want := "1100110000110011"
	for i, b := range got {
		if b != (want[i] == '1') {
			t.Fatalf("resized mask %v, want %s", got, want)
		}
	}
	// 3 → 2: target centres 0.75 and 2.25 fall in source pixels 0 and 2.
	got, _ = FitMask([]bool{true, false, true}, 3, 1, 2, 1, true, "m.png")
	if !got[0] || !got[1] {
		t.Errorf("3→2: %v", got)
	}
	if same, err := FitMask(m, 2, 2, 2, 2, false, "m.png"); err != nil || len(same) != 4 {
		t.Errorf("same size: %v", err)
	}
}
