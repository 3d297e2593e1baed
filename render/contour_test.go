package render

import (
	"image"
	"testing"
)

func parseMask(rows ...string) ([]bool, int, int) {
	h, w := len(rows), len(rows[0])
	m := make([]bool, w*h)
	for y, r := range rows {
		for x, c := range r {
			m[y*w+x] = c == '#'
		}
	}
	return m, w, h
}

// cracks counts the unit edges between inside and outside pixels (pixels
// beyond the image are outside), straight from the definition of a
// 4-neighbour boundary; contour tracing must cover each exactly once.
func cracks(m []bool, w, h int) int {
	at := func(x, y int) bool { return x >= 0 && y >= 0 && x < w && y < h && m[y*w+x] }
	n := 0
	for y := -1; y <= h; y++ {
		for x := -1; x <= w; x++ {
			if at(x, y) != at(x+1, y) {
				n++
			}
			if at(x, y) != at(x, y+1) {
				n++
			}
		}
	}
	return n
}

func perimeter(cs [][]image.Point) int {
	n := 0
	for _, c := range cs {
		for i := range c {
			d := c[(i+1)%len(c)].Sub(c[i])
			n += max(d.X, -d.X) + max(d.Y, -d.Y)
			if d.X != 0 && d.Y != 0 {
				return -1 // not axis-aligned: invalid crack polyline
			}
		}
	}
	return n
}

func TestContours(t *testing.T) {
	for _, c := range []struct {
		name     string
		rows     []string
		loops    int
		vertices int // total, after dropping collinear points
	}{
		{"single pixel", []string{"...", ".#.", "..."}, 1, 4},
		{"rectangle at the border", []string{"###.", "###.", "...."}, 1, 4},
		{"diagonal pixels stay apart", []string{"#.", ".#"}, 2, 8},
		{"ring has a hole", []string{"###", "#.#", "###"}, 2, 8},
		{"L shape", []string{"#..", "#..", "###"}, 1, 6},
		{"empty", []string{"...", "..."}, 0, 0},
	} {
		m, w, h := parseMask(c.rows...)
		cs := contours(m, w, h)
		nv := 0
		for _, p := range cs {
			nv += len(p)
		}
		if len(cs) != c.loops || nv != c.vertices {
			t.Errorf("%s: %d loops, %d vertices; want %d, %d (%v)", c.name, len(cs), nv, c.loops, c.vertices, cs)
		}
		if p, want := perimeter(cs), cracks(m, w, h); p != want {
			t.Errorf("%s: contour length %d, boundary cracks %d", c.name, p, want)
		}
	}
	// A random blob: every crack covered once.
	w, h := 40, 30
	m := make([]bool, w*h)
	s := uint32(7)
	for i := range m {
		s = s*1664525 + 1013904223
		m[i] = s>>29 < 3
	}
	if p, want := perimeter(contours(m, w, h)), cracks(m, w, h); p != want {
		t.Errorf("random mask: contour length %d, cracks %d", p, want)
	}
}
