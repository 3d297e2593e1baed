package kernel

import "golang.org/x/sys/cpu"

// winogradInputSIMD runs WinogradInput on the vector path, one kernel
// call per chunk of sixteen tiles for all channels, and reports whether it
// did (not without AVX-512F).
func winogradInputSIMD(v []float32, vstride, vc int, rows *[4][]float32, strides *[4]int, channels, x0, n, width int) bool {
	if !cpu.X86.HasAVX512F {
		return false
	}
	var ptrs [4]*float32
	for r := range rows {
		ptrs[r] = &rows[r][0]
	}
	for q := 0; q*16 < n; q++ {
		masks := winogradChunkMasks(x0+32*q, width)
		smask := uint64(0xffff)
		if rest := n - 16*q; rest < 16 {
			smask = 1<<rest - 1
		}
		winogradInputAVX512(channels, masks, smask, &ptrs, strides, x0+32*q, &v[16*q], vstride, vc)
	}
	return true
}

// winogradOutputSIMD runs WinogradOutput on the vector path, one kernel
// call per channel with the masks worked out once, and reports whether it
// did (not without AVX-512F).
func winogradOutputSIMD(y []float32, ldy, yc, rows, cols int, m []float32, mstride, mc, channels int, bias []float32, noBias float32, res []float32, lo, hi float32) bool {
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
	for ch := 0; ch < channels; ch++ {
		b := noBias
		if bias != nil {
			b = bias[ch]
		}
		if res != nil {
			winogradOutputResAVX512(chunks, masks, &m[ch*mc], mstride, &y[ch*yc], &res[ch*yc], ldy, rows-1, b, lo, hi)
		} else {
			winogradOutputAVX512(chunks, masks, &m[ch*mc], mstride, &y[ch*yc], ldy, rows-1, b, lo, hi)
		}
	}
	return true
}
