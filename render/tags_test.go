package render

import (
	"image"
	"image/color"
	"math"
	"testing"
)

// crowdedHeat is a map with many small hot regions packed close together,
// as a noisy gradient map produces: a 5×3 cluster of 2×2-pixel boxes one
// pixel apart in a 48×48 image, ranked row by row: at tile size the boxes
// are closer together than a tag is wide.
func crowdedHeat(t *testing.T) (*base, *heat) {
	t.Helper()
	w, h := 48, 48
	b, err := newBase(uniform(w, h, color.RGBA{120, 100, 90, 255}), nil, nil)
	if err != nil {
		t.Fatal(err)
	}
	a := Attribution{Values: make([]float32, w*h)}
	for r := 0; r < 3; r++ {
		for c := 0; c < 5; c++ {
			x, y := 10+3*c, 20+3*r
			a.HotRegions = append(a.HotRegions, image.Rect(x, y, x+2, y+2))
		}
	}
	// One box in the corner, where tags cannot go above or left of it.
	a.HotRegions = append(a.HotRegions, image.Rect(0, 0, 3, 3))
	ht, err := newHeat(&a, w, h)
	if err != nil {
		t.Fatal(err)
	}
	return b, ht
}

// No two number tags overlap, each lies inside the picture and is painted
// where it is reported, and the top-ranked box always keeps its number —
// at panel-tile size (top 3 only) and at full-overlay size (all boxes).
func TestHotRegionTagsDoNotOverlap(t *testing.T) {
	b, ht := crowdedHeat(t)
	for _, tc := range []struct {
		name  string
		px    int
		show  []int
		label float64
	}{
		{"panel tile", 320, panelBoxes(len(ht.boxes), 0), panelTextPx},
		{"panel tile, off-lesion box 16", 320, panelBoxes(len(ht.boxes), 16), panelTextPx},
		{"small tile", 200, panelBoxes(len(ht.boxes), 0), panelTextPx},
		{"overlay", 896, nil, overlayTextPx},
	} {
		dst := image.NewRGBA(image.Rect(0, 0, tc.px+40, tc.px+40))
		pic := image.Rect(20, 20, 20+tc.px, 20+tc.px)
		tags := drawPicture(dst, pic, b, ht, 10, 3, tc.label, tc.show)
		want := len(tc.show)
		if tc.show == nil {
			want = len(ht.boxes)
		}
		if len(tags) == 0 || len(tags) > want {
			t.Fatalf("%s: %d tags for %d boxes", tc.name, len(tags), want)
		}
		rects := make([]image.Rectangle, len(tags))
		for i, g := range tags {
			rects[i] = image.Rect(int(math.Round(g.x0)), int(math.Round(g.y0)), int(math.Round(g.x1)), int(math.Round(g.y1)))
			if !rects[i].In(pic) {
				t.Errorf("%s: tag %d %v leaves the picture %v", tc.name, i, rects[i], pic)
			}
			for j := 0; j < i; j++ {
				if rects[i].Overlaps(rects[j]) {
					t.Errorf("%s: tags %v and %v overlap", tc.name, rects[j], rects[i])
				}
			}
			// The tag's fill is there (corner pixel, clear of the digit).
			if c := dst.RGBAAt(rects[i].Min.X+1, rects[i].Min.Y+1); c != boxColour {
				t.Errorf("%s: tag %d at %v not painted (%v)", tc.name, i, rects[i], c)
			}
		}
		t.Logf("%s: %d of %d boxes numbered", tc.name, len(tags), want)
	}
	// Too many boxes are crowded for all their numbers at tile size: the
	// panel draws three (and the named off-lesion box).
	if got := panelBoxes(16, 0); len(got) != 3 || got[0] != 0 || got[2] != 2 {
		t.Errorf("panelBoxes(16, 0) = %v, want [0 1 2]", got)
	}
	if got := panelBoxes(16, 9); len(got) != 4 || got[3] != 8 {
		t.Errorf("panelBoxes(16, 9) = %v, want [0 1 2 8]", got)
	}
	if got := panelBoxes(2, 2); len(got) != 2 {
		t.Errorf("panelBoxes(2, 2) = %v, want [0 1]", got)
	}
}

// A tag that fits nowhere is left out rather than drawn over another, and
// the box order decides who keeps a number.
func TestPlaceTagsSkipsWhenFull(t *testing.T) {
	bounds := tagRect{0, 0, 30, 30}
	boxes := []tagRect{{5, 5, 25, 25}, {6, 6, 24, 24}, {7, 7, 23, 23}, {8, 8, 22, 22}, {9, 9, 21, 21}}
	sizes := make([][2]float64, len(boxes))
	for i := range sizes {
		sizes[i] = [2]float64{14, 14}
	}
	tags, ok := placeTags(boxes, sizes, bounds)
	if !ok[0] {
		t.Fatal("the top box lost its tag")
	}
	n := 0
	for i := range tags {
		if !ok[i] {
			continue
		}
		n++
		for j := 0; j < i; j++ {
			if ok[j] && tags[i].overlaps(tags[j]) {
				t.Errorf("tags %d %v and %d %v overlap", j, tags[j], i, tags[i])
			}
		}
	}
	// A 30×30 picture holds at most four 14×14 tags.
	if n > 4 || n == len(boxes) {
		t.Errorf("%d of %d tags placed", n, len(boxes))
	}
}
