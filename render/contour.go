package render

import "image"

// contours traces the boundary of a W×H mask (row-major, true = inside) as
// closed polylines on the pixel-corner grid: vertex (x, y) is the top-left
// corner of pixel (x, y). Each contour runs along the cracks between inside
// and outside pixels (pixels beyond the image count as outside), so a
// rendering at any scale puts the line exactly on the mask's edge. Pixels
// that touch only at a corner get separate contours (4-connectivity).
// Collinear vertices are dropped; the first vertex is not repeated.
func contours(mask []bool, w, h int) [][]image.Point {
	in := func(x, y int) bool { return x >= 0 && y >= 0 && x < w && y < h && mask[y*w+x] }
	// out[v] holds bit d set when a boundary edge leaves vertex v in
	// direction d: 0 = +x, 1 = +y, 2 = −x, 3 = −y. Edges run clockwise on
	// screen around inside pixels.
	stride := w + 1
	out := make([]uint8, stride*(h+1))
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			if !mask[y*w+x] {
				continue
			}
			if !in(x, y-1) {
				out[y*stride+x] |= 1 << 0
			}
			if !in(x+1, y) {
				out[y*stride+x+1] |= 1 << 1
			}
			if !in(x, y+1) {
				out[(y+1)*stride+x+1] |= 1 << 2
			}
			if !in(x-1, y) {
				out[(y+1)*stride+x] |= 1 << 3
			}
		}
	}
	dx := [4]int{1, 0, -1, 0}
	dy := [4]int{0, 1, 0, -1}
	var res [][]image.Point
	for v0 := range out {
		for out[v0] != 0 {
			d := 0
			for out[v0]&(1<<d) == 0 {
				d++
			}
			// The first vertex left in raster order is the top-left
			// corner of its loop, so it is a true corner of the polyline.
			x, y := v0%stride, v0/stride
			start := image.Point{x, y}
			poly := []image.Point{start}
			for {
				out[y*stride+x] &^= 1 << d
				x, y = x+dx[d], y+dy[d]
				v := y*stride + x
				if out[v] == 0 {
					break // back at the start
				}
				// Prefer the clockwise turn, then straight, then
				// anticlockwise: at a corner-touching saddle this keeps
				// the two pixels apart.
				nd := -1
				for _, c := range [3]int{(d + 1) % 4, d, (d + 3) % 4} {
					if out[v]&(1<<c) != 0 {
						nd = c
						break
					}
				}
				if nd < 0 {
					break // cannot happen on a consistent edge set
				}
				if nd != d {
					poly = append(poly, image.Point{x, y})
				}
				d = nd
			}
			res = append(res, poly)
		}
	}
	return res
}
