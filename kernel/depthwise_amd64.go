package kernel

import "golang.org/x/sys/cpu"

// dwTailMasks gives the AVX2 kernels their partial-vector store masks:
// &dwTailMasks[8-t] is 8 lane masks with the first t lanes set.
var dwTailMasks = [16]int32{-1, -1, -1, -1, -1, -1, -1, -1}

// dwPlaneSIMD runs the generated kernel for a K×K filter (K = 3, 5) with
// unit dilation and equal strides of 1 or 2, when isa (ISAAuto: the best
// the CPU has) provides one. It reports false, having done nothing, for
// every other shape or when out, scr or filt are too short for the
// kernel's reads and writes (the caller's Go loop then does the plane).
func dwPlaneSIMD(isa ISA, a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	k, s := a.kh, a.sh
	if a.kw != k || a.sw != s || a.dh != 1 || a.dw != 1 || (k != 3 && k != 5) || (s != 1 && s != 2) || a.oh <= 0 || a.ow <= 0 {
		return false
	}
	isa, width := dwResolve(isa)
	if width == 0 {
		return false
	}
	// Furthest float read: the last row's last tap row, plus the whole
	// vectors (two per tap at stride 2) of the last, rounded-up column
	// block.
	vecs := (a.ow + width - 1) / width
	reach := ((a.oh-1)*s+k-1)*a.pitch + s*vecs*width + 2*width + k
	if len(scr) < reach || len(out) < a.oh*a.ow || len(filt) < k*k {
		return false
	}
	tail := a.ow % width
	o, sp, w, ep := &out[0], &scr[0], &filt[0], &par[0]
	acc := b2i(accum)
	spitch, rowstep := 4*s*a.pitch, 4*a.pitch
	if isa == ISAAVX512 {
		mask := 1<<tail - 1
		switch {
		case k == 3 && s == 1:
			dwK3S1AVX512(o, sp, w, ep, a.oh, a.ow, spitch, rowstep, acc, mask)
		case k == 3 && s == 2:
			dwK3S2AVX512(o, sp, w, ep, a.oh, a.ow, spitch, rowstep, acc, mask)
		case k == 5 && s == 1:
			dwK5S1AVX512(o, sp, w, ep, a.oh, a.ow, spitch, rowstep, acc, mask)
		default:
			dwK5S2AVX512(o, sp, w, ep, a.oh, a.ow, spitch, rowstep, acc, mask)
		}
		return true
	}
	mask := &dwTailMasks[8-tail]
	switch {
	case k == 3 && s == 1:
		dwK3S1AVX2(o, sp, w, ep, a.oh, a.ow, spitch, rowstep, acc, mask)
	case k == 3 && s == 2:
		dwK3S2AVX2(o, sp, w, ep, a.oh, a.ow, spitch, rowstep, acc, mask)
	case k == 5 && s == 1:
		dwK5S1AVX2(o, sp, w, ep, a.oh, a.ow, spitch, rowstep, acc, mask)
	default:
		dwK5S2AVX2(o, sp, w, ep, a.oh, a.ow, spitch, rowstep, acc, mask)
	}
	return true
}

// dwResolve turns isa into the vector path to run and its width in
// floats; width 0 means none (no such CPU support, or ISAPortable).
func dwResolve(isa ISA) (ISA, int) {
	if isa == ISAAuto {
		switch {
		case cpu.X86.HasAVX512F:
			isa = ISAAVX512
		case cpu.X86.HasAVX2 && cpu.X86.HasFMA:
			isa = ISAAVX2
		}
	}
	switch {
	case isa == ISAAVX512 && cpu.X86.HasAVX512F:
		return isa, 16
	case isa == ISAAVX2 && cpu.X86.HasAVX2 && cpu.X86.HasFMA:
		return isa, 8
	}
	return isa, 0
}

// dwFillSIMD copies rows rows of n floats from src (row pitch spitch) to
// dst (row pitch dpitch) with the vector copy loop, reporting false (and
// doing nothing) when isa has none or the slices are too short.
func dwFillSIMD(isa ISA, dst, src []float32, rows, n, dpitch, spitch int) bool {
	isa, width := dwResolve(isa)
	if width == 0 || rows <= 0 || n <= 0 || len(dst) < (rows-1)*dpitch+n || len(src) < (rows-1)*spitch+n {
		return false
	}
	tail := n % width
	if isa == ISAAVX512 {
		dwFillAVX512(&dst[0], &src[0], rows, n, 4*dpitch, 4*spitch, 1<<tail-1)
	} else {
		dwFillAVX2(&dst[0], &src[0], rows, n, 4*dpitch, 4*spitch, &dwTailMasks[8-tail])
	}
	return true
}
