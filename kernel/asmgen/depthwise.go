package main

import (
	"fmt"

	. "github.com/mmcloughlin/avo/build"
	. "github.com/mmcloughlin/avo/operand"
	"github.com/mmcloughlin/avo/reg"
)

// genDepthwise emits the depthwise-convolution plane kernels of the
// zero-padded scratch layout (kernel/depthwise.go) for K×K filters
// (K = 3, 5) at strides 1 and 2, for AVX-512 and AVX2.
func genDepthwise(zmm, ymm []reg.VecPhysical) {
	// Lane orders that put the even elements of a vector in its low half
	// and the odd ones in its high half (the de-interleaving fill).
	perm16 := GLOBL("dwDeint16", RODATA|NOPTR)
	for j := 0; j < 16; j++ {
		DATA(4*j, U32(map[bool]int{true: 2 * j, false: 2*(j-8) + 1}[j < 8]))
	}
	perm8 := GLOBL("dwDeint8", RODATA|NOPTR)
	for j := 0; j < 8; j++ {
		DATA(4*j, U32(map[bool]int{true: 2 * j, false: 2*(j-4) + 1}[j < 4]))
	}
	genDWFillPhased("dwFillPhasedAVX512", zmm, 16, perm16)
	genDWFillPhased("dwFillPhasedAVX2", ymm, 8, perm8)
	genDWFill("dwFillAVX512", zmm, 16)
	genDWFill("dwFillAVX2", ymm, 8)
	for _, k := range []int{3, 5} {
		for _, s := range []int{1, 2} {
			// Stride 2 reads the de-interleaved (even/odd column) layout,
			// so every kernel loads unit-stride vectors and can split its
			// accumulators: measured 0–7 % faster at stride 1, most on 7-
			// and 14-wide planes.
			genDWPlane(dwPlane{name: fmt.Sprintf("dwK%dS%dAVX512", k, s), k: k, stride: s, width: 16, vec: zmm, nacc: k})
			genDWPlane(dwPlane{name: fmt.Sprintf("dwK%dS%dAVX2", k, s), k: k, stride: s, width: 8, vec: ymm, nacc: k})
		}
	}
}

// dwPlane describes one plane kernel of the padded layout: a k×k filter
// with unit dilation and equal strides, width float32 lanes per vector
// (16: AVX-512 with k-register tail masks; 8: AVX2+FMA with VMASKMOVPS).
type dwPlane struct {
	name      string
	k, stride int
	width     int
	vec       []reg.VecPhysical
	nacc      int // accumulators per output vector (at most k)
}

// genDWPlane emits a kernel that computes rows output rows of ow values
// each, stored contiguously from o, from a zero-padded input plane s
// (padded rows rowstep bytes apart; output row r starts reading at s +
// r·spitch), so that no tap ever needs a bounds test:
//
//	o[r][j] = clamp(init + Σ_{kh,kw} w[kh·k+kw]·in(r, kh, j, kw), lo, hi)
//
// with in(r, kh, j, kw) = s[r·spitch + kh·rowstep + (j + kw)·4] at stride
// 1 and, at stride 2, s[r·spitch + kh·rowstep + (kw mod 2)·q + (j +
// ⌊kw/2⌋)·4]: the stride-2 plane is stored de-interleaved, each padded row
// as its even columns followed, q bytes on, by its odd ones, so padded
// column 2j + kw is (kw mod 2, j + ⌊kw/2⌋) and every tap is a unit-stride
// vector load, as at stride 1. init is ep[0] (the channel's bias), or the
// current o[r][j] when accum != 0 (the backward pass adds into the input
// gradient), and clamp is min(hi, max(lo, v)) with lo = ep[1], hi = ep[2],
// keeping a NaN v (MAXPS/MINPS return the second source when unordered,
// and v is that operand). The last partial vector of each row is stored
// under a mask (mask is the k-register bit pattern on AVX-512, a pointer
// to 8 lane masks on AVX2); loads are never masked, so s must hold
// readable floats up to a vector past the last tap of the last row
// (scratch slack), whose products land only in masked-off lanes.
//
// Weights, bias and bounds live in registers for the whole plane (AVX2
// 5×5: weights are broadcast from memory per tap, 16 ymm registers being
// too few).
func genDWPlane(d dwPlane) {
	avx512 := d.width == 16
	sig := "func(o, s, w, ep *float32, rows, ow, spitch, rowstep, q, accum, mask int)"
	maskDoc := "mask holds the tail's k-register bits"
	if !avx512 {
		sig = "func(o, s, w, ep *float32, rows, ow, spitch, rowstep, q, accum int, mask *int32)"
		maskDoc = "mask points to the tail's 8 lane masks"
	}
	TEXT(d.name, NOSPLIT, sig)
	Doc(fmt.Sprintf("%s computes rows×ow outputs of a %d×%d stride-%d depthwise filter from a zero-padded plane, with the bias (or accumulation) and clamp fused; %s.", d.name, d.k, d.k, d.stride, maskDoc))
	Pragma("noescape")

	v := d.vec
	bias, lo, hi, mask, aux := v[0], v[1], v[2], v[3], v[4]
	taps := d.k * d.k
	wreg := v[5:]
	inReg := len(wreg) >= taps
	// Extra accumulators from the registers the weights leave free: the
	// taps of kernel row kh go to accs[kh mod len(accs)], summed before
	// the clamp, so a vector's dependent FMA chain is k taps long instead
	// of k² (4-cycle FMA latency × 9 or 25 would otherwise bound narrow
	// rows, where there are few independent vectors in flight).
	free := wreg
	if inReg {
		free = wreg[taps:]
	}
	if len(free) == 0 {
		panic("no accumulator register for " + d.name)
	}
	accs := free[:min(len(free), d.nacc)]
	acc := accs[0]

	op := Load(Param("o"), GP64())
	s := Load(Param("s"), GP64())
	rows := Load(Param("rows"), GP64())
	rs := Load(Param("rowstep"), GP64())
	wp := Load(Param("w"), GP64())
	epp := Load(Param("ep"), GP64())
	VBROADCASTSS(Mem{Base: epp}, bias)
	VBROADCASTSS(Mem{Base: epp, Disp: 4}, lo)
	VBROADCASTSS(Mem{Base: epp, Disp: 8}, hi)
	if inReg {
		for t := 0; t < taps; t++ {
			VBROADCASTSS(Mem{Base: wp, Disp: 4 * t}, wreg[t])
		}
	}
	if avx512 {
		m := GP64()
		Load(Param("mask"), m)
		KMOVW(m.As32(), reg.K1)
	} else {
		m := Load(Param("mask"), GP64())
		VMOVUPS(Mem{Base: m}, mask)
	}
	var q reg.GPVirtual
	if d.stride == 2 {
		q = GP64()
		Load(Param("q"), q)
	}
	accum, err := Param("accum").Resolve()
	check(err)
	spitch, err := Param("spitch").Resolve()
	check(err)
	owm, err := Param("ow").Resolve()
	check(err)

	// Row pointers: base[0] is kernel row 0 (rows 1, 2, 4 are reached by
	// scaling rowstep) and base[1] row 3; odd[...] the same rows' odd
	// columns at stride 2.
	nb := 1
	if d.k > 3 {
		nb = 2
	}
	var base, odd []reg.GPVirtual
	for i := 0; i < nb; i++ {
		base = append(base, GP64())
		if d.stride == 2 {
			odd = append(odd, GP64())
		}
	}
	n := GP64()
	tapMem := func(kh, kw int) Mem {
		b, disp := base, 4*kw
		if d.stride == 2 {
			disp = 4 * (kw / 2)
			if kw%2 == 1 {
				b = odd
			}
		}
		switch kh {
		case 0:
			return Mem{Base: b[0], Disp: disp}
		case 1:
			return Mem{Base: b[0], Index: rs, Scale: 1, Disp: disp}
		case 2:
			return Mem{Base: b[0], Index: rs, Scale: 2, Disp: disp}
		case 3:
			return Mem{Base: b[1], Disp: disp}
		case 4:
			return Mem{Base: b[0], Index: rs, Scale: 4, Disp: disp}
		}
		panic("kernel row out of range")
	}

	step := func(tail bool) {
		lbl := d.name + "_full"
		if tail {
			lbl = d.name + "_tail"
		}
		CMPQ(accum.Addr, Imm(0))
		JNE(LabelRef(lbl + "_acc"))
		VMOVAPS(bias, acc)
		JMP(LabelRef(lbl + "_taps"))
		Label(lbl + "_acc")
		switch {
		case !tail:
			VMOVUPS(Mem{Base: op}, acc)
		case avx512:
			VMOVUPS_Z(Mem{Base: op}, reg.K1, acc)
		default:
			VMASKMOVPS(Mem{Base: op}, mask, acc)
		}
		Label(lbl + "_taps")
		for _, a := range accs[1:] {
			if avx512 {
				VPXORD(a, a, a)
			} else {
				VXORPS(a, a, a)
			}
		}
		for kh := 0; kh < d.k; kh++ {
			for kw := 0; kw < d.k; kw++ {
				t := kh*d.k + kw
				wv := aux
				if inReg {
					wv = wreg[t]
				} else {
					VBROADCASTSS(Mem{Base: wp, Disp: 4 * t}, aux)
				}
				VFMADD231PS(tapMem(kh, kw), wv, accs[kh%len(accs)])
			}
		}
		// Sum the accumulators pairwise, two adds deep.
		for i := 2; i+1 < len(accs); i += 2 {
			VADDPS(accs[i+1], accs[i], accs[i])
		}
		if len(accs) > 1 {
			VADDPS(accs[1], acc, acc)
		}
		for i := 2; i < len(accs); i += 2 {
			VADDPS(accs[i], acc, acc)
		}
		VMAXPS(acc, lo, acc)
		VMINPS(acc, hi, acc)
		switch {
		case !tail:
			VMOVUPS(acc, Mem{Base: op})
		case avx512:
			VMOVUPS(acc, reg.K1, Mem{Base: op})
		default:
			VMASKMOVPS(acc, mask, Mem{Base: op})
		}
	}

	TESTQ(rows, rows)
	JZ(LabelRef(d.name + "_done"))
	Label(d.name + "_row")
	MOVQ(s, base[0])
	if nb > 1 {
		LEAQ(Mem{Base: s, Index: rs, Scale: 2}, base[1])
		ADDQ(rs, base[1])
	}
	for i := range odd {
		LEAQ(Mem{Base: base[i], Index: q, Scale: 1}, odd[i])
	}
	MOVQ(owm.Addr, n)
	Label(d.name + "_vec")
	CMPQ(n, Imm(uint64(d.width)))
	JL(LabelRef(d.name + "_tailcheck"))
	step(false)
	adv := U32(4 * d.width)
	for i := range base {
		ADDQ(adv, base[i])
	}
	for i := range odd {
		ADDQ(adv, odd[i])
	}
	ADDQ(adv, op)
	SUBQ(Imm(uint64(d.width)), n)
	JMP(LabelRef(d.name + "_vec"))
	Label(d.name + "_tailcheck")
	TESTQ(n, n)
	JZ(LabelRef(d.name + "_rowend"))
	step(true)
	LEAQ(Mem{Base: op, Index: n, Scale: 4}, op)
	Label(d.name + "_rowend")
	ADDQ(spitch.Addr, s)
	DECQ(rows)
	JNZ(LabelRef(d.name + "_row"))
	Label(d.name + "_done")
	VZEROUPPER()
	RET()
}

// genDWFillPhased emits the de-interleaving copy of an image plane into
// the stride-2 padded layout (see genDWPlane): for rows rows of n floats
// from src (spitch bytes apart), the even-indexed floats go to ev and the
// odd ones to od (both advancing dpitch bytes per row; the caller points
// them into the even or odd column half according to the parity of the
// left padding). Each block of width floats is one permute that gathers
// the evens into the low half of the vector and the odds into the high
// half, and two half-width stores. The last partial block of a row is
// loaded and stored under masks: AVX-512 takes them packed in one int
// (bits 0–15 the load, 16–31 the evens, 32–47 the odds); AVX2 takes
// pointers to 8 lane masks for the load and 4 for each store.
func genDWFillPhased(name string, vec []reg.VecPhysical, width int, perm Mem) {
	avx512 := width == 16
	sig := "func(ev, od, src *float32, rows, n, dpitch, spitch, mask int)"
	if !avx512 {
		sig = "func(ev, od, src *float32, rows, n, dpitch, spitch int, mload, mev, mod *int32)"
	}
	TEXT(name, NOSPLIT, sig)
	Doc(fmt.Sprintf("%s de-interleaves rows×n floats into even and odd columns, %d at a time, the tail under masks.", name, width))
	Pragma("noescape")
	ev := Load(Param("ev"), GP64())
	od := Load(Param("od"), GP64())
	src := Load(Param("src"), GP64())
	rows := Load(Param("rows"), GP64())
	pv := vec[0]
	x := vec[1]
	half := reg.X2 // the high half, extracted
	if avx512 {
		half = reg.Y2
	}
	hiHalf := vec[2] // the same register at full width, for masked stores
	VMOVUPS(perm, pv)
	var ml, me, mo reg.VecPhysical
	if avx512 {
		m := GP64()
		Load(Param("mask"), m)
		KMOVW(m.As32(), reg.K1)
		SHRQ(Imm(16), m)
		KMOVW(m.As32(), reg.K2)
		SHRQ(Imm(16), m)
		KMOVW(m.As32(), reg.K3)
	} else {
		ml, me, mo = reg.Y3, reg.X4, reg.X5
		for _, c := range []struct {
			p string
			r reg.VecPhysical
		}{{"mload", ml}, {"mev", me}, {"mod", mo}} {
			r := Load(Param(c.p), GP64())
			VMOVUPS(Mem{Base: r}, c.r)
		}
	}
	lowOf := func(r reg.VecPhysical) reg.VecPhysical { // the low half of x
		if avx512 {
			return reg.Y1
		}
		return reg.X1
	}
	nm, err := Param("n").Resolve()
	check(err)
	dp, err := Param("dpitch").Resolve()
	check(err)
	sp, err := Param("spitch").Resolve()
	check(err)
	e, o, s, n := GP64(), GP64(), GP64(), GP64()
	extract := func() {
		if avx512 {
			VEXTRACTF64X4(Imm(1), x, half)
		} else {
			VEXTRACTF128(Imm(1), x, half)
		}
	}
	TESTQ(rows, rows)
	JZ(LabelRef(name + "_done"))
	Label(name + "_row")
	MOVQ(ev, e)
	MOVQ(od, o)
	MOVQ(src, s)
	MOVQ(nm.Addr, n)
	Label(name + "_vec")
	CMPQ(n, Imm(uint64(width)))
	JL(LabelRef(name + "_tail"))
	VPERMPS(Mem{Base: s}, pv, x)
	extract()
	VMOVUPS(lowOf(x), Mem{Base: e})
	VMOVUPS(half, Mem{Base: o})
	ADDQ(U32(4*width), s)
	ADDQ(U32(2*width), e)
	ADDQ(U32(2*width), o)
	SUBQ(Imm(uint64(width)), n)
	JMP(LabelRef(name + "_vec"))
	Label(name + "_tail")
	TESTQ(n, n)
	JZ(LabelRef(name + "_next"))
	if avx512 {
		VMOVUPS_Z(Mem{Base: s}, reg.K1, x)
		VPERMPS(x, pv, x)
		extract()
		VMOVUPS(x, reg.K2, Mem{Base: e})
		VMOVUPS(hiHalf, reg.K3, Mem{Base: o})
	} else {
		VMASKMOVPS(Mem{Base: s}, ml, x)
		VPERMPS(x, pv, x)
		extract()
		VMASKMOVPS(lowOf(x), me, Mem{Base: e})
		VMASKMOVPS(half, mo, Mem{Base: o})
	}
	Label(name + "_next")
	ADDQ(dp.Addr, ev)
	ADDQ(dp.Addr, od)
	ADDQ(sp.Addr, src)
	DECQ(rows)
	JNZ(LabelRef(name + "_row"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}

// genDWFill emits the copy of an image plane into the padded scratch
// plane: rows rows of n floats, from src (spitch bytes between rows) to
// dst (dpitch bytes between rows), whole vectors then one masked vector
// per row (mask as for the plane kernels). MobileNet's late planes are 7
// and 14 floats wide, where a memmove call or a scalar Go loop per row
// cost as much as the convolution itself.
func genDWFill(name string, vec []reg.VecPhysical, width int) {
	avx512 := width == 16
	sig := "func(dst, src *float32, rows, n, dpitch, spitch, mask int)"
	if !avx512 {
		sig = "func(dst, src *float32, rows, n, dpitch, spitch int, mask *int32)"
	}
	TEXT(name, NOSPLIT, sig)
	Doc(fmt.Sprintf("%s copies rows×n floats between row pitches, %d lanes at a time, the tail under a mask.", name, width))
	Pragma("noescape")
	dst := Load(Param("dst"), GP64())
	src := Load(Param("src"), GP64())
	rows := Load(Param("rows"), GP64())
	v, m := vec[0], vec[1]
	if avx512 {
		k := GP64()
		Load(Param("mask"), k)
		KMOVW(k.As32(), reg.K1)
	} else {
		mp := Load(Param("mask"), GP64())
		VMOVUPS(Mem{Base: mp}, m)
	}
	nm, err := Param("n").Resolve()
	check(err)
	dp, err := Param("dpitch").Resolve()
	check(err)
	sp, err := Param("spitch").Resolve()
	check(err)
	d, s, n := GP64(), GP64(), GP64()
	TESTQ(rows, rows)
	JZ(LabelRef(name + "_done"))
	Label(name + "_row")
	MOVQ(dst, d)
	MOVQ(src, s)
	MOVQ(nm.Addr, n)
	Label(name + "_vec")
	CMPQ(n, Imm(uint64(width)))
	JL(LabelRef(name + "_tail"))
	VMOVUPS(Mem{Base: s}, v)
	VMOVUPS(v, Mem{Base: d})
	ADDQ(U32(4*width), s)
	ADDQ(U32(4*width), d)
	SUBQ(Imm(uint64(width)), n)
	JMP(LabelRef(name + "_vec"))
	Label(name + "_tail")
	TESTQ(n, n)
	JZ(LabelRef(name + "_next"))
	if avx512 {
		VMOVUPS_Z(Mem{Base: s}, reg.K1, v)
		VMOVUPS(v, reg.K1, Mem{Base: d})
	} else {
		VMASKMOVPS(Mem{Base: s}, m, v)
		VMASKMOVPS(v, m, Mem{Base: d})
	}
	Label(name + "_next")
	ADDQ(dp.Addr, dst)
	ADDQ(sp.Addr, src)
	DECQ(rows)
	JNZ(LabelRef(name + "_row"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}
