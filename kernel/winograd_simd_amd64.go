package kernel

import "golang.org/x/sys/cpu"

// winogradInputSIMD runs WinogradInput on the vector path and reports
// whether it did (not without AVX-512F). Runs of chunks that lie inside
// the rows go through one call with full masks; edge chunks one by one
// with their own.
func winogradInputSIMD(v []float32, vstride int, rows *[4][]float32, x0, n, width int) bool {
	if !cpu.X86.HasAVX512F {
		return false
	}
	var ptrs [4]*float32
	for r := range rows {
		ptrs[r] = &rows[r][0]
	}
	chunks := (n + 15) / 16
	partial := n%16 != 0
	for q := 0; q < chunks; {
		masks, full := winogradChunkMasks(x0+32*q, width)
		if !full || (partial && q == chunks-1) {
			smask := uint64(0xffff)
			if partial && q == chunks-1 {
				smask = 1<<(n%16) - 1
			}
			winogradInputAVX512(1, masks, smask, &ptrs, x0+32*q, &v[16*q], vstride)
			q++
			continue
		}
		run := 1
		for q+run < chunks && !(partial && q+run == chunks-1) {
			if _, ok := winogradChunkMasks(x0+32*(q+run), width); !ok {
				break
			}
			run++
		}
		winogradInputAVX512(run, masks, 0xffff, &ptrs, x0+32*q, &v[16*q], vstride)
		q += run
	}
	return true
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
