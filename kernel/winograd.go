package kernel

import "fmt"

// The Winograd convolution F(2×2, 3×3) of Lavin & Gray ("Fast Algorithms
// for Convolutional Neural Networks", CVPR 2016, section 4) computes a 2×2
// block of a 3×3 correlation from a 4×4 input tile d and the filter g as
//
//	Y = Aᵀ·[(G·g·Gᵀ) ⊙ (Bᵀ·d·B)]·A
//
// with
//
//	Bᵀ = [1 0 −1 0; 0 1 1 0; 0 −1 1 0; 0 1 0 −1]
//	G  = [1 0 0; ½ ½ ½; ½ −½ ½; 0 0 1]
//	Aᵀ = [1 1 1 0; 0 1 −1 −1]
//
// Summed over input channels, the element-wise product becomes sixteen
// independent matrix products (one per element ξ = 4a+b of the 4×4
// transform): M_ξ (outputs × tiles) = U_ξ (outputs × channels) ·
// V_ξ (channels × tiles), 16 multiply-adds per 2×2 outputs and channel
// instead of 36: 2.25× fewer. The price is the transforms (adds only) and
// slightly different rounding than a direct sum: each output is still a
// sum over its own 3×3 receptive field only (no tap outside it enters with
// a zero weight), but through the transformed values.
//
// The functions below hold one tile's transform element ξ at index
// ξ·stride + j for tile j, so sixteen consecutive tiles are one vector.

// WinogradFilter writes the transformed filters U = G·g·Gᵀ of k×c 3×3
// filters w (w[(i·c+j)·9 + 3·ky + kx]): element ξ of filter (i, j) at
// u[ξ·k·c + i·c + j], sixteen k×c matrices. The transform is computed in
// float64 and rounded once.
func WinogradFilter(u, w []float32, k, c int) {
	if len(w) < k*c*9 || len(u) < 16*k*c {
		panic(fmt.Sprintf("kernel: WinogradFilter has %d filter and %d output values, want %d and %d", len(w), len(u), k*c*9, 16*k*c))
	}
	gm := [4][3]float64{{1, 0, 0}, {0.5, 0.5, 0.5}, {0.5, -0.5, 0.5}, {0, 0, 1}}
	for i := 0; i < k*c; i++ {
		g := w[i*9 : i*9+9]
		var t [4][3]float64 // G·g
		for a := 0; a < 4; a++ {
			for x := 0; x < 3; x++ {
				for y := 0; y < 3; y++ {
					t[a][x] += gm[a][y] * float64(g[3*y+x])
				}
			}
		}
		for a := 0; a < 4; a++ {
			for b := 0; b < 4; b++ {
				var s float64
				for x := 0; x < 3; x++ {
					s += t[a][x] * gm[b][x]
				}
				u[(4*a+b)*k*c+i] = float32(s)
			}
		}
	}
}

// WinogradInput writes the input transforms V = Bᵀ·d·B of n tiles of each
// of channels channels: tile j of channel ch is d[r][c] =
// row(ch, r)[x0 + 2j + c] (r, c < 4), row(ch, r) = rows[r][ch·strides[r]:],
// where a column outside [0, width) reads as zero, and element ξ of its
// transform goes to v[ch·vc + ξ·vstride + j]. So a convolution's zero
// padding costs no copy: x0 is negative by the left pad, columns past
// width are the right pad, and a row of padding is a row of zeros (stride
// 0). With AVX-512 sixteen tiles are one vector, loads are zero-masked at
// the edges (they never fault), and the loop over channels runs inside
// the kernel.
func WinogradInput(v []float32, vstride, vc int, rows *[4][]float32, strides *[4]int, channels, x0, n, width int) {
	if n <= 0 || channels <= 0 {
		return
	}
	for r := range rows {
		if len(rows[r]) < (channels-1)*strides[r]+width || width < 1 {
			panic(fmt.Sprintf("kernel: WinogradInput row %d has %d values, want %d", r, len(rows[r]), (channels-1)*strides[r]+width))
		}
	}
	if len(v) < (channels-1)*vc+15*vstride+n {
		panic(fmt.Sprintf("kernel: WinogradInput of %d tiles × %d channels has %d output values (strides %d, %d)", n, channels, len(v), vstride, vc))
	}
	if winogradInputSIMD(v, vstride, vc, rows, strides, channels, x0, n, width) {
		return
	}
	for ch := 0; ch < channels; ch++ {
		var rc [4][]float32
		for r := range rc {
			rc[r] = rows[r][ch*strides[r]:]
		}
		winogradInputGo(v[ch*vc:], vstride, &rc, x0, 0, n, width)
	}
}

// winogradInputGo is WinogradInput for one channel's tiles j0 … n−1.
func winogradInputGo(v []float32, vstride int, rows *[4][]float32, x0, j0, n, width int) {
	at := func(r, x int) float32 {
		if x < 0 || x >= width {
			return 0
		}
		return rows[r][x]
	}
	for j := j0; j < n; j++ {
		var t [4][4]float32
		for r := 0; r < 4; r++ {
			x := x0 + 2*j
			d := [4]float32{at(r, x), at(r, x+1), at(r, x+2), at(r, x+3)}
			t[r] = [4]float32{d[0] - d[2], d[1] + d[2], d[2] - d[1], d[1] - d[3]}
		}
		for b := 0; b < 4; b++ {
			v[(0+b)*vstride+j] = t[0][b] - t[2][b]
			v[(4+b)*vstride+j] = t[1][b] + t[2][b]
			v[(8+b)*vstride+j] = t[2][b] - t[1][b]
			v[(12+b)*vstride+j] = t[1][b] - t[3][b]
		}
	}
}

// winogradChunkMasks returns the load masks of the vector chunk whose
// first tile reads column x: the four loads at floats 0, 16, 2, 18 from
// x, 16 lanes each, a lane set when its column lies in [0, width).
func winogradChunkMasks(x, width int) (masks uint64) {
	if x >= 0 && x+34 <= width {
		return ^uint64(0)
	}
	for k, o := range [4]int{0, 16, 2, 18} {
		// Lanes [lo, hi) of this load fall inside the row.
		lo, hi := min(max(-(x+o), 0), 16), min(max(width-(x+o), 0), 16)
		if lo < hi {
			masks |= (uint64(1)<<hi - uint64(1)<<lo) << (16 * k)
		}
	}
	return masks
}

// WinogradOutput writes the output transforms Y = Aᵀ·M·A of the
// ⌈cols/2⌉ tiles of each of channels channels, tile j of channel ch having
// element ξ at m[ch·mc + ξ·mstride + j], each followed by the convolution
// epilogue: y[ch·yc + r·ldy + 2j + c] = min(hi, max(lo, (Y[r][c] + b) +
// res[ch·yc + r·ldy + 2j + c])) for r < rows (1 or 2) and 2j+c < cols,
// with b = bias[ch] (noBias when bias is nil), rounded in that order as
// BiasAddClamp rounds (res nil adds nothing).
func WinogradOutput(y []float32, ldy, yc, rows, cols int, m []float32, mstride, mc, channels int, bias []float32, noBias float32, res []float32, lo, hi float32) {
	if cols <= 0 || rows <= 0 || channels <= 0 {
		return
	}
	tiles := (cols + 1) / 2
	last := (channels-1)*yc + (rows-1)*ldy + cols
	if rows > 2 || len(y) < last || len(m) < (channels-1)*mc+15*mstride+tiles || (res != nil && len(res) < last) || (bias != nil && len(bias) < channels) {
		panic(fmt.Sprintf("kernel: WinogradOutput of %d channels of %d×%d has %d output values (ldy %d, yc %d), %d transform values (strides %d, %d)", channels, rows, cols, len(y), ldy, yc, len(m), mstride, mc))
	}
	if winogradOutputSIMD(y, ldy, yc, rows, cols, m, mstride, mc, channels, bias, noBias, res, lo, hi) {
		return
	}
	for ch := 0; ch < channels; ch++ {
		b := noBias
		if bias != nil {
			b = bias[ch]
		}
		var r []float32
		if res != nil {
			r = res[ch*yc:]
		}
		winogradOutputGo(y[ch*yc:], ldy, rows, cols, m[ch*mc:], mstride, b, r, lo, hi)
	}
}

// winogradOutputGo is WinogradOutput's scalar path.
func winogradOutputGo(y []float32, ldy, rows, cols int, m []float32, mstride int, bias float32, res []float32, lo, hi float32) {
	for j := 0; j < (cols+1)/2; j++ {
		var s [2][4]float32
		for b := 0; b < 4; b++ {
			m0, m1, m2, m3 := m[b*mstride+j], m[(4+b)*mstride+j], m[(8+b)*mstride+j], m[(12+b)*mstride+j]
			s[0][b] = (m0 + m1) + m2
			s[1][b] = (m1 - m2) - m3
		}
		for r := 0; r < rows; r++ {
			out := [2]float32{(s[r][0] + s[r][1]) + s[r][2], (s[r][1] - s[r][2]) - s[r][3]}
			for c, v := range out {
				x := 2*j + c
				if x >= cols {
					break
				}
				v += bias
				if res != nil {
					v += res[r*ldy+x]
				}
				y[r*ldy+x] = min(hi, max(lo, v))
			}
		}
	}
}
