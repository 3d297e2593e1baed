package kernel

import "golang.org/x/sys/cpu"

// winogradInputSIMD runs WinogradInput's vector path and returns how many
// leading tiles it did (0 without AVX-512F).
func winogradInputSIMD(v []float32, vstride int, x []float32, ldx, n int) int {
	if !cpu.X86.HasAVX512F {
		return 0
	}
	chunks, tail := n/16, n%16
	if tail > 0 && len(x) < 3*ldx+32*(chunks+1)+2 {
		tail = 0
	}
	if chunks == 0 && tail == 0 {
		return 0
	}
	winogradInputAVX512(chunks, uint64(1)<<tail-1, &x[0], ldx, &v[0], vstride)
	if tail > 0 {
		return n
	}
	return 16 * chunks
}

// winogradOutputSIMD runs WinogradOutput on the vector path and reports
// whether it did (not without AVX-512F).
func winogradOutputSIMD(y []float32, ldy, rows, cols int, m []float32, mstride int, bias float32, res []float32, lo, hi float32) bool {
	if !cpu.X86.HasAVX512F {
		return false
	}
	chunks, rem := cols/32, cols%32
	var masks uint64
	if rem > 0 {
		tiles := (rem + 1) / 2
		lo16, hi16 := min(rem, 16), max(rem-16, 0)
		masks = uint64(1)<<tiles - 1 | (uint64(1)<<lo16-1)<<16 | (uint64(1)<<hi16-1)<<32
	}
	if res != nil {
		winogradOutputResAVX512(chunks, masks, &m[0], mstride, &y[0], &res[0], ldy, rows-1, bias, lo, hi)
	} else {
		winogradOutputAVX512(chunks, masks, &m[0], mstride, &y[0], ldy, rows-1, bias, lo, hi)
	}
	return true
}

// transposeSIMD: Transpose has the AVX-512 block path on amd64.
const transposeSIMD = true

// transpose16 runs n 16×16 blocks of Transpose on the vector path.
func transpose16(n int, src []float32, lds int, dst []float32, ldd int) {
	transpose16AVX512(n, &src[0], lds, &dst[0], ldd)
}
