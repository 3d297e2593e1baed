package measure

import "math"

// edtInf stands in for +∞ in the distance transform; squares of real
// distances on any image we accept stay far below it, and unlike +Inf it
// keeps the parabola intersections finite.
const edtInf = 1e20

// squaredEDT returns, for every pixel of a W×H grid, the squared Euclidean
// distance to the nearest pixel where in is true (0 on those pixels, edtInf
// everywhere when no pixel is true). It is the exact linear-time algorithm
// of Felzenszwalb & Huttenlocher, "Distance Transforms of Sampled
// Functions", Theory of Computing 8 (2012): a 1-D lower envelope of
// parabolas along columns, then along rows. Exact distances (rather than a
// chamfer approximation) keep the dilation a true disk at every radius.
func squaredEDT(in []bool, w, h int) []float64 {
	d := make([]float64, w*h)
	for i, b := range in {
		if !b {
			d[i] = edtInf
		}
	}
	n := max(w, h)
	f := make([]float64, n)
	out := make([]float64, n)
	v := make([]int, n)
	z := make([]float64, n+1)
	for x := 0; x < w; x++ {
		for y := 0; y < h; y++ {
			f[y] = d[y*w+x]
		}
		edt1D(f[:h], out[:h], v, z)
		for y := 0; y < h; y++ {
			d[y*w+x] = out[y]
		}
	}
	for y := 0; y < h; y++ {
		row := d[y*w : (y+1)*w]
		copy(f[:w], row)
		edt1D(f[:w], out[:w], v, z)
		copy(row, out[:w])
	}
	return d
}

// edt1D is the 1-D pass: out[q] = min_p (q−p)² + f[p].
func edt1D(f, out []float64, v []int, z []float64) {
	n := len(f)
	k := 0
	v[0] = 0
	z[0] = math.Inf(-1)
	z[1] = math.Inf(1)
	for q := 1; q < n; q++ {
		s := parabolaCross(f, v[k], q)
		// z[0] = −∞, so k never drops below 0.
		for s <= z[k] {
			k--
			s = parabolaCross(f, v[k], q)
		}
		k++
		v[k] = q
		z[k] = s
		z[k+1] = math.Inf(1)
	}
	k = 0
	for q := 0; q < n; q++ {
		for z[k+1] < float64(q) {
			k++
		}
		p := v[k]
		out[q] = float64((q-p)*(q-p)) + f[p]
	}
}

// parabolaCross is where the parabolas rooted at p and q (p < q) intersect.
func parabolaCross(f []float64, p, q int) float64 {
	return ((f[q] + float64(q*q)) - (f[p] + float64(p*p))) / float64(2*q-2*p)
}
