package kernel

import "golang.org/x/sys/cpu"

// dwVectorShape reports whether isa (ISAAuto: the best the CPU has) has
// a plane kernel for the filter of a: K×K with K = 3 or 5, unit dilation
// and equal strides of 1 or 2.
func dwVectorShape(isa ISA, a *dwArgs) bool {
	k, s := a.kh, a.sh
	if a.kw != k || a.sw != s || a.dh != 1 || a.dw != 1 || (k != 3 && k != 5) || (s != 1 && s != 2) || a.oh <= 0 || a.ow <= 0 {
		return false
	}
	_, width := dwResolve(isa)
	return width > 0
}

// dwPlaneSIMD runs the generated kernel for the shape of a when isa has
// one (see dwVectorShape; stride 2 only on a phased plane). It reports
// false, having done nothing, for every other shape or when out, scr or
// filt are too short for the kernel's reads and writes (the caller's Go
// loop then does the plane).
func dwPlaneSIMD(isa ISA, a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	v, ok := dwPrepare(isa, a)
	return ok && v.plane(a, out, scr, filt, par, accum)
}

// dwVec is what dwPlaneSIMD works out from a plane's shape: the kernel,
// its masks and strides, and how far it reads. Worked out once for a run
// of planes of one shape: in a profile of a 576-channel 14×14 stride-2
// layer, working it out for every 7×7 plane took 44 % as long as the
// kernel itself; once per run, the 14×14 and 7×7 MobileNetV2 depthwise
// layers (each in a graph with a 1×1 layer after it) ran 2–3 % faster.
type dwVec struct {
	isa                ISA // ISAAVX512 or ISAAVX2
	k, s               int
	reach              int // floats of the padded plane the kernel reads
	mask               int // AVX-512 tail mask
	mask2              *int32
	spitch, rowstep, q int
}

// dwPrepare returns the dwVec for a, or false when isa has no kernel for
// its shape.
func dwPrepare(isa ISA, a *dwArgs) (dwVec, bool) {
	if !dwVectorShape(isa, a) || (a.sw == 2) != (a.q != 0) {
		return dwVec{}, false
	}
	k, s := a.kh, a.sh
	auto := isa == ISAAuto
	isa, width := dwResolve(isa)
	if auto && isa == ISAAVX512 && a.ow <= 8 && cpu.X86.HasAVX2 && cpu.X86.HasFMA {
		// Rows of at most 8 outputs (MobileNet's 7×7 planes) fill a ymm
		// vector but not half a zmm one; on Zen 4, which splits zmm
		// operations in two, the AVX2 kernel measured 15–20 % faster
		// there (BenchmarkDepthwiseFused, c960_7x7), and elsewhere the
		// narrower vector costs nothing.
		isa, width = ISAAVX2, 8
	}
	// Furthest float read: the last row's last tap row and column, plus
	// the whole vectors of the last, rounded-up column block.
	vecs := (a.ow + width - 1) / width
	tail := a.ow % width
	v := dwVec{
		isa: isa, k: k, s: s,
		reach:   ((a.oh-1)*s+k-1)*a.pitch + max(a.colOff(k-2), a.colOff(k-1)) + vecs*width,
		spitch:  4 * s * a.pitch,
		rowstep: 4 * a.pitch,
		q:       4 * a.q,
	}
	if isa == ISAAVX512 {
		v.mask = 1<<tail - 1
	} else {
		v.mask2 = &dwTailMasks[8-tail]
	}
	return v, true
}

// plane runs the kernel on one plane of the shape v was made for,
// reporting false, having done nothing, when out, scr or filt are too
// short.
func (v *dwVec) plane(a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	if len(scr) < v.reach || len(out) < a.oh*a.ow || len(filt) < v.k*v.k {
		return false
	}
	o, sp, w, ep := &out[0], &scr[0], &filt[0], &par[0]
	acc := b2i(accum)
	k, s := v.k, v.s
	if v.isa == ISAAVX512 {
		switch {
		case k == 3 && s == 1:
			dwK3S1AVX512(o, sp, w, ep, a.oh, a.ow, v.spitch, v.rowstep, v.q, acc, v.mask)
		case k == 3 && s == 2:
			dwK3S2AVX512(o, sp, w, ep, a.oh, a.ow, v.spitch, v.rowstep, v.q, acc, v.mask)
		case k == 5 && s == 1:
			dwK5S1AVX512(o, sp, w, ep, a.oh, a.ow, v.spitch, v.rowstep, v.q, acc, v.mask)
		default:
			dwK5S2AVX512(o, sp, w, ep, a.oh, a.ow, v.spitch, v.rowstep, v.q, acc, v.mask)
		}
		return true
	}
	switch {
	case k == 3 && s == 1:
		dwK3S1AVX2(o, sp, w, ep, a.oh, a.ow, v.spitch, v.rowstep, v.q, acc, v.mask2)
	case k == 3 && s == 2:
		dwK3S2AVX2(o, sp, w, ep, a.oh, a.ow, v.spitch, v.rowstep, v.q, acc, v.mask2)
	case k == 5 && s == 1:
		dwK5S1AVX2(o, sp, w, ep, a.oh, a.ow, v.spitch, v.rowstep, v.q, acc, v.mask2)
	default:
		dwK5S2AVX2(o, sp, w, ep, a.oh, a.ow, v.spitch, v.rowstep, v.q, acc, v.mask2)
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

// dwFillPhasedSIMD de-interleaves rows rows of n floats of src (row pitch
// spitch): the even-indexed ones to ev, the odd ones to od (both row pitch
// dpitch), reporting false (and doing nothing) when isa has no vector
// path or the slices are too short.
func dwFillPhasedSIMD(isa ISA, ev, od, src []float32, rows, n, dpitch, spitch int) bool {
	isa, width := dwResolve(isa)
	ne, no := (n+1)/2, n/2
	if width == 0 || rows <= 0 || n <= 0 || len(ev) < (rows-1)*dpitch+ne || len(od) < (rows-1)*dpitch+max(no, 1) || len(src) < (rows-1)*spitch+n {
		return false
	}
	mask, m1, m2, m3 := dwCopyMasks(isa, n%width, true)
	if isa == ISAAVX512 {
		dwFillPhasedAVX512(&ev[0], &od[0], &src[0], rows, n, 4*dpitch, 4*spitch, mask)
	} else {
		dwFillPhasedAVX2(&ev[0], &od[0], &src[0], rows, n, 4*dpitch, 4*spitch, m1, m2, m3)
	}
	return true
}
