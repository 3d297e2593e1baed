package main

import (
	"fmt"

	. "github.com/mmcloughlin/avo/build"
	. "github.com/mmcloughlin/avo/operand"
	"github.com/mmcloughlin/avo/reg"
)

// genEpilogue emits the vector epilogues applied to convolution outputs,
// the im2col panel copy that feeds them, the ReLU/Clip gradient mask and
// the ordered maximum of max-pooling.
func genEpilogue(zmm, ymm []reg.VecPhysical) {
	genBiasClamp("biasClampAVX512", zmm, 16, false)
	genBiasClamp("biasClampAVX2", ymm, 8, false)
	genBiasClamp("biasAddClampAVX512", zmm, 16, true)
	genBiasClamp("biasAddClampAVX2", ymm, 8, true)
	genPanelRows(false)
	genPanelRows(true)
	genPanelRowsNarrow()
	genPanelRowsNarrow3()
	genMaskRange("maskRangeAVX512", 16)
	genMaskRange("maskRangeAVX2", 8)
	genRangeBits()
	genMaskBits()
	genMax9()
	genMax9Stride2()
	genAddStride2()
	genAddTo()
}

// genAddTo emits addToAVX512: dst[i] += src[i] for i < n rounded down to
// 64, four vectors a step (the accumulation of two gradients of one
// value, a memory-bound pass).
func genAddTo() {
	name := "addToAVX512"
	TEXT(name, NOSPLIT, "func(n int, dst, src *float32)")
	Doc(name + " adds src[i] into dst[i] for i < n rounded down to 64.")
	Pragma("noescape")
	n := Load(Param("n"), GP64())
	dst := Load(Param("dst"), GP64())
	src := Load(Param("src"), GP64())
	v := []reg.VecPhysical{reg.Z0, reg.Z1, reg.Z2, reg.Z3}
	countedLoop(name, n, 64, func() {
		for i, r := range v {
			VMOVUPS(Mem{Base: dst, Disp: 64 * i}, r)
			VADDPS(Mem{Base: src, Disp: 64 * i}, r, r)
			VMOVUPS(r, Mem{Base: dst, Disp: 64 * i})
		}
		ADDQ(U32(256), src)
		ADDQ(U32(256), dst)
	})
}

// genAddStride2 emits addStride2AVX512, the stride-2 scatter-add of
// col2im: dst[2j] += src[j] for j < n rounded down to 16. Sixteen source
// values are spread over the even lanes of two vectors (VPERMPS), and the
// adds, loads and stores are masked to the even lanes, so the odd
// elements of dst are neither read nor written (another goroutine may
// own them) and no load reaches past dst[2j+30].
func genAddStride2() {
	lo := laneTable("addSpreadLo", func(j int) int { return j / 2 })
	hi := laneTable("addSpreadHi", func(j int) int { return 8 + j/2 })
	name := "addStride2AVX512"
	TEXT(name, NOSPLIT, "func(n int, dst, src *float32)")
	Doc(name + " adds src[j] into dst[2j] for j < n rounded down to 16, touching only those elements of dst.")
	Pragma("noescape")
	n := Load(Param("n"), GP64())
	dst := Load(Param("dst"), GP64())
	src := Load(Param("src"), GP64())
	even := GP32()
	MOVL(U32(0x5555), even)
	KMOVW(even, reg.K1)
	ilo, ihi := reg.Z2, reg.Z3
	VMOVUPS(lo, ilo)
	VMOVUPS(hi, ihi)
	v, a, b := reg.Z0, reg.Z1, reg.Z4
	countedLoop(name, n, 16, func() {
		VMOVUPS(Mem{Base: src}, v)
		for i, idx := range []reg.VecPhysical{ilo, ihi} {
			VPERMPS(v, idx, a)
			VMOVUPS_Z(Mem{Base: dst, Disp: 64 * i}, reg.K1, b)
			VADDPS(a, b, reg.K1, b)
			VMOVUPS(b, reg.K1, Mem{Base: dst, Disp: 64 * i})
		}
		ADDQ(U8(64), src)
		ADDQ(Imm(128), dst)
	})
}

// genMax9 emits max9AVX512: dst[j] = the first of the nine sources' values
// that no later one exceeds, scanning src[0][j] … src[8][j] (best = v when
// v > best), 16 lanes at a time for n rounded down to 16. VMAXPS returns
// its second source when the first is not greater (equal values, either
// one NaN), which is exactly that step with best as the second source.
func genMax9() {
	name := "max9AVX512"
	TEXT(name, NOSPLIT, "func(n int, dst *float32, src *[9]*float32)")
	Doc(name + " sets dst[j] to the ordered maximum of src[0][j] … src[8][j] (a value replaces the kept one only when greater) for j < n rounded down to 16.")
	Pragma("noescape")
	n := Load(Param("n"), GP64())
	dst := Load(Param("dst"), GP64())
	sp := Load(Param("src"), GP64())
	var p [9]reg.GPVirtual
	for i := range p {
		p[i] = GP64()
		MOVQ(Mem{Base: sp, Disp: 8 * i}, p[i])
	}
	best, v := reg.Z0, reg.Z1
	countedLoop(name, n, 16, func() {
		VMOVUPS(Mem{Base: p[0]}, best)
		for i := 1; i < 9; i++ {
			VMOVUPS(Mem{Base: p[i]}, v)
			VMAXPS(best, v, best)
		}
		VMOVUPS(best, Mem{Base: dst})
		for i := range p {
			ADDQ(U8(64), p[i])
		}
		ADDQ(U8(64), dst)
	})
}

// genMax9Stride2 emits max9Stride2AVX512, the 3×3 window at column stride
// 2 from three rows: dst[j] is the ordered maximum of r[2j], r[2j+1],
// r[2j+2] for r = rows[0], rows[1], rows[2] in that order, taken as in
// max9AVX512. It also emits argMax9Stride2AVX512, which instead stores
// where that maximum is: offs[t] for the tap t (0…8 in scan order) whose
// value is kept, the same scan with VCMPPS (greater, false for NaN)
// choosing the lanes that move on.
func genMax9Stride2() {
	evenLanes := laneTable("maxEvenLanes", func(j int) int { return 2 * j })
	oddLanes := laneTable("maxOddLanes", func(j int) int { return 2*j + 1 })
	for _, arg := range []bool{false, true} {
		name, sig := "max9Stride2AVX512", "func(n int, dst *float32, rows *[3]*float32)"
		doc := name + " sets dst[j] to the ordered maximum of r[2j], r[2j+1], r[2j+2] over the three rows (a value replaces the kept one only when greater) for j < n rounded down to 16; each row must hold 2·n+1 readable values."
		if arg {
			name, sig = "argMax9Stride2AVX512", "func(n int, dst *int32, rows *[3]*float32, offs *[9]int32)"
			doc = name + " sets dst[j] to offs[t] for the tap t whose value max9Stride2AVX512 keeps for output j."
		}
		TEXT(name, NOSPLIT, sig)
		Doc(doc)
		Pragma("noescape")
		n := Load(Param("n"), GP64())
		dst := Load(Param("dst"), GP64())
		rp := Load(Param("rows"), GP64())
		var offs reg.Register
		if arg {
			offs = Load(Param("offs"), GP64())
		}
		var p [3]reg.GPVirtual
		for i := range p {
			p[i] = GP64()
			MOVQ(Mem{Base: rp, Disp: 8 * i}, p[i])
		}
		ev, od := reg.Z2, reg.Z3
		VMOVUPS(evenLanes, ev)
		VMOVUPS(oddLanes, od)
		best, at := reg.Z0, reg.Z6
		taps := [3]reg.VecPhysical{reg.Z1, reg.Z4, reg.Z5}
		countedLoop(name, n, 16, func() {
			for i := range p {
				// Taps 3i, 3i+1, 3i+2: the even lanes of r[2j…2j+32), and the
				// even and odd lanes of r[2j+1…2j+33). Tap 0 is the kept value.
				taps := taps
				if i == 0 {
					taps[0] = best
				}
				VMOVUPS(Mem{Base: p[i]}, taps[0])
				VPERMT2PS(Mem{Base: p[i], Disp: 64}, ev, taps[0])
				VMOVUPS(Mem{Base: p[i], Disp: 4}, taps[1])
				VMOVAPS(taps[1], taps[2])
				VPERMT2PS(Mem{Base: p[i], Disp: 68}, ev, taps[1])
				VPERMT2PS(Mem{Base: p[i], Disp: 68}, od, taps[2])
				for k, tap := range taps {
					t := 3*i + k
					switch {
					case t == 0:
						if arg {
							VPBROADCASTD(Mem{Base: offs}, at)
						}
					case arg:
						VCMPPS(Imm(0x1e), best, tap, reg.K1) // tap > best, ordered
						VMOVAPS(tap, reg.K1, best)
						VPBROADCASTD(Mem{Base: offs, Disp: 4 * t}, reg.K1, at)
					default:
						VMAXPS(best, tap, best)
					}
				}
			}
			if arg {
				VMOVDQU32(at, Mem{Base: dst})
			} else {
				VMOVUPS(best, Mem{Base: dst})
			}
			for i := range p {
				ADDQ(Imm(128), p[i])
			}
			ADDQ(U8(64), dst)
		})
	}
}

// genPanelRows emits the row loop of Im2colPlan.Im2colPanelsPadded for
// 32-wide panels: for each of rows panel rows, the row's 32 values are
// assembled in two zmm registers from up to nseg segments of the padded
// input, then stored with two full-width stores. Lanes no segment covers
// stay zero: the zero padding of a partial last panel.
//
// segs[s] packs one segment: bits 0–31 the signed shift, in floats, from
// the row's tap base to the input value of panel lane 0; bits 32–47 the
// lane mask of the first 16 lanes; bits 48–63 that of the last 16.
//
// With gather false (unit column stride) each half is one merge-masked
// load: lanes outside the segment keep what earlier segments put there,
// and a masked lane never faults, so the load address may run off either
// end of the segment. With gather true (panelRowsGatherAVX512, for a
// column stride other than 1) lane j reads shift + lanes[j] (lanes holds
// j·stride) with one merge-masked gather per half.
func genPanelRows(gather bool) {
	name := "panelRowsAVX512"
	sig := "func(rows int, dst, base *float32, offs *int32, segs *uint64, nseg int)"
	doc := name + " writes rows 32-wide panel rows of dst from the padded input at base: row r takes segments segs[0:nseg] relative to base+offs[r]."
	if gather {
		name = "panelRowsGatherAVX512"
		sig = "func(rows int, dst, base *float32, offs *int32, segs *uint64, nseg int, lanes *int32)"
		doc = name + " is panelRowsAVX512 for strided columns: lane j of a segment reads base+offs[r]+shift+lanes[j]."
	}
	TEXT(name, NOSPLIT, sig)
	Doc(doc)
	Pragma("noescape")
	rows := Load(Param("rows"), GP64())
	dst := Load(Param("dst"), GP64())
	base := Load(Param("base"), GP64())
	offs := Load(Param("offs"), GP64())
	segs := Load(Param("segs"), GP64())
	nseg := Load(Param("nseg"), GP64())
	laneLo, laneHi := reg.Z2, reg.Z3
	if gather {
		lanes := Load(Param("lanes"), GP64())
		VMOVDQU32(Mem{Base: lanes}, laneLo)
		VMOVDQU32(Mem{Base: lanes, Disp: 64}, laneHi)
	}
	rowBase, sp, sn, w := GP64(), GP64(), GP64(), GP64()
	var shift reg.GPVirtual
	if !gather {
		shift = GP64()
	}
	lo, hi, sh, idxLo, idxHi := reg.Z0, reg.Z1, reg.Z4, reg.Z5, reg.Z6
	Label(name + "_row")
	TESTQ(rows, rows)
	JZ(LabelRef(name + "_done"))
	MOVLQSX(Mem{Base: offs}, rowBase)
	LEAQ(Mem{Base: base, Index: rowBase, Scale: 4}, rowBase)
	VPXORD(lo, lo, lo)
	VPXORD(hi, hi, hi)
	MOVQ(segs, sp)
	MOVQ(nseg, sn)
	Label(name + "_seg")
	TESTQ(sn, sn)
	JZ(LabelRef(name + "_store"))
	MOVQ(Mem{Base: sp}, w)
	if gather {
		VPBROADCASTD(w.As32(), sh)
		VPADDD(laneLo, sh, idxLo)
		VPADDD(laneHi, sh, idxHi)
	} else {
		MOVLQSX(w.As32(), shift)
	}
	SHRQ(U8(32), w)
	KMOVW(w.As32(), reg.K1)
	SHRQ(U8(16), w)
	KMOVW(w.As32(), reg.K2)
	if gather {
		VGATHERDPS(Mem{Base: rowBase, Index: idxLo, Scale: 4}, reg.K1, lo)
		VGATHERDPS(Mem{Base: rowBase, Index: idxHi, Scale: 4}, reg.K2, hi)
	} else {
		VMOVUPS(Mem{Base: rowBase, Index: shift, Scale: 4}, reg.K1, lo)
		VMOVUPS(Mem{Base: rowBase, Index: shift, Scale: 4, Disp: 64}, reg.K2, hi)
	}
	ADDQ(U8(8), sp)
	DECQ(sn)
	JMP(LabelRef(name + "_seg"))
	Label(name + "_store")
	VMOVUPS(lo, Mem{Base: dst})
	VMOVUPS(hi, Mem{Base: dst, Disp: 64})
	ADDQ(U32(128), dst)
	ADDQ(U8(4), offs)
	DECQ(rows)
	JMP(LabelRef(name + "_row"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}

// genBiasClamp emits x[j] = min(hi, max(lo, x[j]+bias)) for the first
// n/width·width values of x (the caller finishes the rest): a convolution's
// bias and a fused ReLU (lo = 0, hi = +Inf) or Clip. With residual it
// emits x[j] = min(hi, max(lo, (x[j]+bias)+r[j])) instead: a residual
// addition fused in as well (ResNet's identity shortcut), the two
// additions kept separate, in the order the unfused Conv and Add operators
// round them, so the result is bit identical. Four vectors per iteration
// hide the add→max→min latency chain. The operand order of VMAXPS/VMINPS
// makes a NaN in x come out as NaN (the instructions return their second
// source operand when either is NaN), as Go's max and min do.
func genBiasClamp(name string, vec []reg.VecPhysical, width int, residual bool) {
	if residual {
		TEXT(name, NOSPLIT, "func(n int, x, r *float32, bias, lo, hi float32)")
		Doc(fmt.Sprintf("%s sets x[j] = min(hi, max(lo, (x[j]+bias)+r[j])) for j < n rounded down to %d.", name, width))
	} else {
		TEXT(name, NOSPLIT, "func(n int, x *float32, bias, lo, hi float32)")
		Doc(fmt.Sprintf("%s sets x[j] = min(hi, max(lo, x[j]+bias)) for j < n rounded down to %d.", name, width))
	}
	Pragma("noescape")
	n := Load(Param("n"), GP64())
	x := Load(Param("x"), GP64())
	var r reg.Register
	if residual {
		r = Load(Param("r"), GP64())
	}
	b, l, h := vec[0], vec[1], vec[2]
	for i, p := range []string{"bias", "lo", "hi"} {
		m, err := Param(p).Resolve()
		check(err)
		VBROADCASTSS(m.Addr, []reg.VecPhysical{b, l, h}[i])
	}
	const unrollEp = 4
	v := vec[3 : 3+unrollEp]
	step := func(count int) {
		for i := 0; i < count; i++ {
			VADDPS(Mem{Base: x, Disp: 4 * width * i}, b, v[i])
		}
		if residual {
			for i := 0; i < count; i++ {
				VADDPS(Mem{Base: r, Disp: 4 * width * i}, v[i], v[i])
			}
		}
		for i := 0; i < count; i++ {
			VMAXPS(v[i], l, v[i])
		}
		for i := 0; i < count; i++ {
			VMINPS(v[i], h, v[i])
		}
		for i := 0; i < count; i++ {
			VMOVUPS(v[i], Mem{Base: x, Disp: 4 * width * i})
		}
		ADDQ(U32(4*width*count), x)
		if residual {
			ADDQ(U32(4*width*count), r)
		}
		SUBQ(Imm(uint64(width*count)), n)
	}
	Label(name + "_loop4")
	CMPQ(n, Imm(uint64(unrollEp*width)))
	JL(LabelRef(name + "_loop1"))
	step(unrollEp)
	JMP(LabelRef(name + "_loop4"))
	Label(name + "_loop1")
	CMPQ(n, Imm(uint64(width)))
	JL(LabelRef(name + "_done"))
	step(1)
	JMP(LabelRef(name + "_loop1"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}

// genPanelRowsNarrow emits panelRowsAVX512 for panels at most 16 wide
// (the 12- and 4-row panels of a packed A operand, see
// Packed.SgemmRowPanels) at unit column stride: each row is assembled in
// one zmm register from merge-masked loads (segment masks in bits 32–47
// of segs, as for the wide loop) and stored under the mask of the
// panel's width lanes, rows width floats apart.
func genPanelRowsNarrow() {
	name := "panelRowsNarrowAVX512"
	TEXT(name, NOSPLIT, "func(rows int, dst, base *float32, offs *int32, segs *uint64, nseg int, width int, mask uint16)")
	Doc(name + " writes rows panel rows of width <= 16 floats to dst (rows width apart, stored under mask = 1<<width - 1) from the padded input at base: row r takes segments segs[0:nseg] relative to base+offs[r].")
	p := narrowParams(true)
	rowBase, sp, sn, w, shift := GP64(), GP64(), GP64(), GP64(), GP64()
	narrowRows(name, p, rowBase, func(rowBase reg.GPVirtual, lo reg.VecPhysical) {
		MOVQ(p.segs, sp)
		MOVQ(p.nseg, sn)
		Label(name + "_seg")
		TESTQ(sn, sn)
		JZ(LabelRef(name + "_store"))
		MOVQ(Mem{Base: sp}, w)
		MOVLQSX(w.As32(), shift)
		SHRQ(U8(32), w)
		KMOVW(w.As32(), reg.K1)
		VMOVUPS(Mem{Base: rowBase, Index: shift, Scale: 4}, reg.K1, lo)
		ADDQ(U8(8), sp)
		DECQ(sn)
		JMP(LabelRef(name + "_seg"))
		Label(name + "_store")
	})
}

// genPanelRowsNarrow3 is genPanelRowsNarrow for panels of at most three
// segments (every panel of a 7×7 or 14×14 map lowered 12 or 4 wide): the
// three shifts and lane masks are loaded once, outside the row loop, so
// each row is three merge-masked loads (a zero mask for an absent segment
// loads nothing and cannot fault) and one masked store. The general loop
// reloaded each segment's shift and mask for every row, which made
// lowering a late layer's input cost as much as a tenth of its product.
func genPanelRowsNarrow3() {
	name := "panelRowsNarrow3AVX512"
	TEXT(name, NOSPLIT, "func(rows int, dst, base *float32, offs *int32, segs *[3]uint64, width int, mask uint16)")
	Doc(name + " is panelRowsNarrowAVX512 for exactly three segments segs (unused ones with a zero lane mask).")
	p := narrowParams(false)
	var shifts [3]reg.GPVirtual
	masks := []reg.OpmaskPhysical{reg.K1, reg.K2, reg.K4}
	for i := range shifts {
		w := GP64()
		MOVQ(Mem{Base: p.segs, Disp: 8 * i}, w)
		shifts[i] = GP64()
		MOVLQSX(w.As32(), shifts[i])
		SHRQ(U8(32), w)
		KMOVW(w.As32(), masks[i])
	}
	narrowRows(name, p, GP64(), func(rowBase reg.GPVirtual, lo reg.VecPhysical) {
		for i := range shifts {
			VMOVUPS(Mem{Base: rowBase, Index: shifts[i], Scale: 4}, masks[i], lo)
		}
	})
}

// narrowArgs are the narrow panel-row loops' parameters in registers.
type narrowArgs struct{ rows, dst, base, offs, segs, nseg, width reg.Register }

// narrowParams loads the narrow loops' parameters (nseg only for the
// general loop); the store mask goes to K3 and width becomes the row
// stride in bytes.
func narrowParams(nseg bool) narrowArgs {
	Pragma("noescape")
	var p narrowArgs
	p.rows = Load(Param("rows"), GP64())
	p.dst = Load(Param("dst"), GP64())
	p.base = Load(Param("base"), GP64())
	p.offs = Load(Param("offs"), GP64())
	p.segs = Load(Param("segs"), GP64())
	if nseg {
		p.nseg = Load(Param("nseg"), GP64())
	}
	p.width = Load(Param("width"), GP64())
	m := Load(Param("mask"), GP32())
	KMOVW(m, reg.K3)
	SHLQ(U8(2), p.width)
	return p
}

// narrowRows emits the row loop of both narrow loops: rowBase = base +
// 4·offs[r], the row register cleared, assemble(rowBase, row) to load the
// row's segments, then the store under K3 and the step to the next row.
// The caller allocates rowBase, so each loop keeps its register order and
// its generated code.
func narrowRows(name string, p narrowArgs, rowBase reg.GPVirtual, assemble func(rowBase reg.GPVirtual, lo reg.VecPhysical)) {
	lo := reg.Z0
	Label(name + "_row")
	TESTQ(p.rows, p.rows)
	JZ(LabelRef(name + "_done"))
	MOVLQSX(Mem{Base: p.offs}, rowBase)
	LEAQ(Mem{Base: p.base, Index: rowBase, Scale: 4}, rowBase)
	VPXORD(lo, lo, lo)
	assemble(rowBase, lo)
	VMOVUPS(lo, reg.K3, Mem{Base: p.dst})
	ADDQ(p.width, p.dst)
	ADDQ(U8(4), p.offs)
	DECQ(p.rows)
	JMP(LabelRef(name + "_row"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}

// genMaskRange emits dst[j] = g[j] where bits(y[j]) − lo < span (unsigned)
// and +0 elsewhere, for the first n/width·width values: the gradient mask
// of ReLU and Clip read from their output (see kernel.MaskRange). The
// unsigned compare is a signed one after flipping the sign bits of both
// sides (AVX2 has only signed integer compares); the AVX-512 loop uses
// VPCMPUD and a zero-masked move.
func genMaskRange(name string, width int) {
	TEXT(name, NOSPLIT, "func(n int, dst, grad, y *float32, lo, span uint32)")
	Doc(fmt.Sprintf("%s sets dst[j] = grad[j] where bits(y[j])-lo < span (unsigned), else +0, for j < n rounded down to %d.", name, width))
	Pragma("noescape")
	n := Load(Param("n"), GP64())
	dst := Load(Param("dst"), GP64())
	gp := Load(Param("grad"), GP64())
	y := Load(Param("y"), GP64())
	loM, err := Param("lo").Resolve()
	check(err)
	spanM, err := Param("span").Resolve()
	check(err)
	bytes := 4 * width
	if width == 16 {
		lo, span, v := reg.Z0, reg.Z1, reg.Z2
		VBROADCASTSS(loM.Addr, lo)
		VBROADCASTSS(spanM.Addr, span)
		Label(name + "_loop")
		CMPQ(n, Imm(uint64(width)))
		JL(LabelRef(name + "_done"))
		VMOVDQU32(Mem{Base: y}, v)
		VPSUBD(lo, v, v)
		VPCMPUD(Imm(1), span, v, reg.K1) // v < span, unsigned
		VMOVDQU32_Z(Mem{Base: gp}, reg.K1, reg.Z3)
		VMOVDQU32(reg.Z3, Mem{Base: dst})
		ADDQ(U32(bytes), y)
		ADDQ(U32(bytes), gp)
		ADDQ(U32(bytes), dst)
		SUBQ(Imm(uint64(width)), n)
		JMP(LabelRef(name + "_loop"))
	} else {
		lo, span, sign, v, gv := reg.Y0, reg.Y1, reg.Y2, reg.Y3, reg.Y4
		VBROADCASTSS(loM.Addr, lo)
		VBROADCASTSS(spanM.Addr, span)
		// sign = 0x80000000 in every lane: all ones shifted left by 31.
		VPCMPEQD(sign, sign, sign)
		VPSLLD(U8(31), sign, sign)
		VPXOR(sign, span, span)
		Label(name + "_loop")
		CMPQ(n, Imm(uint64(width)))
		JL(LabelRef(name + "_done"))
		VMOVDQU(Mem{Base: y}, v)
		VPSUBD(lo, v, v)
		VPXOR(sign, v, v)
		// span > v (signed, after the flips) iff v < span unsigned.
		VPCMPGTD(v, span, v)
		VPAND(Mem{Base: gp}, v, gv)
		VMOVDQU(gv, Mem{Base: dst})
		ADDQ(U32(bytes), y)
		ADDQ(U32(bytes), gp)
		ADDQ(U32(bytes), dst)
		SUBQ(Imm(uint64(width)), n)
		JMP(LabelRef(name + "_loop"))
	}
	Label(name + "_done")
	VZEROUPPER()
	RET()
}

// genRangeBits emits rangeBitsAVX512: bit j of bits is set where
// bits(y[j]) − lo < span (unsigned), for j < n rounded down to 64, four
// vectors a step: the test of genMaskRange kept as one bit per value
// (kernel.RangeBits), the compact form of a ReLU or Clip output that only
// its gradient mask needs.
func genRangeBits() {
	name := "rangeBitsAVX512"
	TEXT(name, NOSPLIT, "func(n int, bits *uint64, y *float32, lo, span uint32)")
	Doc(name + " sets bit j of bits where bits(y[j])-lo < span (unsigned), else clears it, for j < n rounded down to 64.")
	Pragma("noescape")
	n := Load(Param("n"), GP64())
	bits := Load(Param("bits"), GP64())
	y := Load(Param("y"), GP64())
	loM, err := Param("lo").Resolve()
	check(err)
	spanM, err := Param("span").Resolve()
	check(err)
	lo, span := reg.Z0, reg.Z1
	VBROADCASTSS(loM.Addr, lo)
	VBROADCASTSS(spanM.Addr, span)
	v := []reg.VecPhysical{reg.Z2, reg.Z3, reg.Z4, reg.Z5}
	k := []reg.Physical{reg.K1, reg.K2, reg.K3, reg.K4}
	countedLoop(name, n, 64, func() {
		for i, r := range v {
			VMOVDQU32(Mem{Base: y, Disp: 64 * i}, r)
			VPSUBD(lo, r, r)
			VPCMPUD(Imm(1), span, r, k[i]) // y − lo < span, unsigned
			KMOVW(k[i], Mem{Base: bits, Disp: 2 * i})
		}
		ADDQ(U32(256), y)
		ADDQ(U8(8), bits)
	})
}

// genMaskBits emits maskBitsAVX512: dst[j] = grad[j] where bit j of bits
// is set and +0 elsewhere, for j < n rounded down to 64 (kernel.MaskBits).
func genMaskBits() {
	name := "maskBitsAVX512"
	TEXT(name, NOSPLIT, "func(n int, dst, grad *float32, bits *uint64)")
	Doc(name + " sets dst[j] = grad[j] where bit j of bits is set, else +0, for j < n rounded down to 64.")
	Pragma("noescape")
	n := Load(Param("n"), GP64())
	dst := Load(Param("dst"), GP64())
	gp := Load(Param("grad"), GP64())
	bits := Load(Param("bits"), GP64())
	v := []reg.VecPhysical{reg.Z0, reg.Z1, reg.Z2, reg.Z3}
	k := []reg.Physical{reg.K1, reg.K2, reg.K3, reg.K4}
	countedLoop(name, n, 64, func() {
		for i, r := range v {
			KMOVW(Mem{Base: bits, Disp: 2 * i}, k[i])
			VMOVDQU32_Z(Mem{Base: gp, Disp: 64 * i}, k[i], r)
			VMOVDQU32(r, Mem{Base: dst, Disp: 64 * i})
		}
		ADDQ(U32(256), gp)
		ADDQ(U32(256), dst)
		ADDQ(U8(8), bits)
	})
}

// countedLoop emits the loop of the element-wise kernels: while n ≥ step,
// body (which also advances the pointers), then n −= step; then
// VZEROUPPER and RET.
func countedLoop(name string, n reg.Register, step int, body func()) {
	Label(name + "_loop")
	CMPQ(n, Imm(uint64(step)))
	JL(LabelRef(name + "_done"))
	body()
	SUBQ(U8(step), n)
	JMP(LabelRef(name + "_loop"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}

// laneTable emits a read-only table of 16 uint32 lane indices, f(j) for
// lane j, for VPERMPS and VPERMT2PS.
func laneTable(name string, f func(j int) int) Mem {
	m := GLOBL(name, RODATA|NOPTR)
	for j := 0; j < 16; j++ {
		DATA(4*j, U32(f(j)))
	}
	return m
}
