package kernel

import (
	"math"
	"math/rand"
	"testing"
)

// winogradConv computes one k×c 3×3 correlation of x (c×h×w, zero padding
// pad on every side) through WinogradFilter, WinogradInput (reading the
// unpadded rows, the padding through its masks and a zero row), a float64
// sum over channels rounded to float32 per element, and WinogradOutput,
// the way a caller of these functions does.
func winogradConv(x, w []float32, c, h, wd, k, pad int, bias []float32) (y []float32, oh, ow int) {
	oh, ow = h+2*pad-2, wd+2*pad-2
	th, tw := (oh+1)/2, (ow+1)/2
	zero := make([]float32, wd)
	u := make([]float32, 16*k*c)
	WinogradFilter(u, w, k, c)
	tiles := th * tw
	v := make([]float32, 16*c*tiles)
	for i := 0; i < th; i++ {
		var rows [4][]float32
		var strides [4]int
		for r := range rows {
			rows[r] = zero
			if iy := 2*i + r - pad; iy >= 0 && iy < h {
				rows[r], strides[r] = x[iy*wd:], h*wd
			}
		}
		WinogradInput(v[i*tw:], c*tiles, tiles, &rows, &strides, c, -pad, tw, wd)
	}
	m := make([]float32, 16*k*tiles)
	for e := 0; e < 16; e++ {
		for ki := 0; ki < k; ki++ {
			for t := 0; t < tiles; t++ {
				var s float64
				for ci := 0; ci < c; ci++ {
					s += float64(u[(e*k+ki)*c+ci]) * float64(v[(e*c+ci)*tiles+t])
				}
				m[(e*k+ki)*tiles+t] = float32(s)
			}
		}
	}
	y = make([]float32, k*oh*ow)
	inf := float32(math.Inf(1))
	for i := 0; i < th; i++ {
		rows := min(2, oh-2*i)
		WinogradOutput(y[2*i*ow:], ow, oh*ow, rows, ow, m[i*tw:], k*tiles, tiles, k, bias, 0, nil, -inf, inf)
	}
	return y, oh, ow
}

// TestWinogradMatchesCorrelation checks F(2×2, 3×3) (Lavin & Gray, "Fast
// Algorithms for Convolutional Neural Networks", CVPR 2016; the matrices
// Bᵀ, G, Aᵀ are recalled from the paper, so this test is what checks them)
// against the definition of the 3×3 correlation, summed in float64, on
// odd and even map sizes, with and without padding.
func TestWinogradMatchesCorrelation(t *testing.T) {
	rng := rand.New(rand.NewSource(7))
	for _, tc := range []struct{ c, h, w, k, pad int }{
		{1, 4, 4, 1, 0}, {3, 7, 7, 5, 1}, {8, 14, 14, 4, 1}, {5, 9, 40, 3, 1}, {4, 33, 66, 2, 1}, {2, 11, 6, 3, 0},
	} {
		x := make([]float32, tc.c*tc.h*tc.w)
		w := make([]float32, tc.k*tc.c*9)
		bias := make([]float32, tc.k)
		for i := range x {
			x[i] = float32(rng.NormFloat64())
		}
		for i := range w {
			w[i] = float32(rng.NormFloat64())
		}
		for i := range bias {
			bias[i] = float32(rng.NormFloat64())
		}
		y, oh, ow := winogradConv(x, w, tc.c, tc.h, tc.w, tc.k, tc.pad, bias)
		for ki := 0; ki < tc.k; ki++ {
			for oy := 0; oy < oh; oy++ {
				for ox := 0; ox < ow; ox++ {
					want, mag := float64(bias[ki]), math.Abs(float64(bias[ki]))
					for ci := 0; ci < tc.c; ci++ {
						for ky := 0; ky < 3; ky++ {
							for kx := 0; kx < 3; kx++ {
								iy, ix := oy+ky-tc.pad, ox+kx-tc.pad
								if iy < 0 || iy >= tc.h || ix < 0 || ix >= tc.w {
									continue
								}
								p := float64(w[(ki*tc.c+ci)*9+3*ky+kx]) * float64(x[(ci*tc.h+iy)*tc.w+ix])
								want += p
								mag += math.Abs(p)
							}
						}
					}
					got := float64(y[(ki*oh+oy)*ow+ox])
					// float32 rounding of the transforms: a few units in
					// the last place of the sum of magnitudes (common
					// practice for a tolerance of this kind).
					if d := math.Abs(got - want); d > 1e-6*mag*float64(8+tc.c) {
						t.Fatalf("%+v: y[%d][%d][%d] = %v, correlation %v (|Δ| %g, Σ|terms| %g)", tc, ki, oy, ox, got, want, d, mag)
					}
				}
			}
		}
	}
}

// TestWinogradVectorMatchesScalar checks that the AVX-512 transforms round
// exactly as the scalar ones, on every tail length, one and two output
// rows, with and without a residual, NaN included.
func TestWinogradVectorMatchesScalar(t *testing.T) {
	rng := rand.New(rand.NewSource(3))
	fill := func(n int) []float32 { return normals(rng, n) }
	for n := 1; n <= 50; n++ {
		for _, x0 := range []int{-2, -1, 0, 3} {
			// Rows just wide enough for the tiles, shorter, and longer:
			// every edge chunk's masks; three channels, one of them
			// reading a shared zero row (stride 0).
			for _, width := range []int{2*n + 2 + x0, 2*n + x0, 2*n + 40} {
				if width < 1 {
					continue
				}
				const channels, stride = 3, 7
				var rows [4][]float32
				strides := [4]int{width + stride, width + stride, 0, width + stride}
				for r := range rows {
					rows[r] = fill((channels-1)*strides[r] + width)
				}
				rows[1][width/2] = float32(math.NaN())
				const vs = 64
				const vc = 16*vs + 5
				got := fill((channels-1)*vc + 15*vs + n + 16)
				want := append([]float32(nil), got...)
				WinogradInput(got, vs, vc, &rows, &strides, channels, x0, n, width)
				for ch := 0; ch < channels; ch++ {
					var rc [4][]float32
					for r := range rc {
						rc[r] = rows[r][ch*strides[r]:]
					}
					winogradInputGo(want[ch*vc:], vs, &rc, x0, 0, n, width)
				}
				for i := range want {
					if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
						t.Fatalf("input n=%d x0=%d width=%d: v[%d] = %v, scalar %v", n, x0, width, i, got[i], want[i])
					}
				}
			}
		}
	}
	for cols := 1; cols <= 70; cols++ {
		tiles := (cols + 1) / 2
		const ms, ldy = 48, 80
		m := fill(15*ms + tiles)
		m[3*ms+tiles/2] = float32(math.NaN())
		for rows := 1; rows <= 2; rows++ {
			for _, withRes := range []bool{false, true} {
				var res []float32
				if withRes {
					res = fill((rows-1)*ldy + cols)
				}
				got := fill((rows-1)*ldy + cols + 40)
				want := append([]float32(nil), got...)
				WinogradOutput(got, ldy, 0, rows, cols, m, ms, 0, 1, nil, 0.25, res, -1.5, 2)
				winogradOutputGo(want, ldy, rows, cols, m, ms, 0.25, res, -1.5, 2)
				for i := range want {
					if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
						t.Fatalf("output cols=%d rows=%d res=%v: y[%d] = %v, scalar %v", cols, rows, withRes, i, got[i], want[i])
					}
				}
			}
		}
	}
}

// normals returns n standard normal values from rng.
func normals(rng *rand.Rand, n int) []float32 {
	s := make([]float32, n)
	for i := range s {
		s[i] = float32(rng.NormFloat64())
	}
	return s
}
