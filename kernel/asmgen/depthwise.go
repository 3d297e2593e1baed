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
	// Index vectors of the AVX-512 stride-2 loads: lane j takes element
	// 2j (even) or 2j+1 (odd) of a 32-float pair of tables.
	idx := [2]Mem{GLOBL("dwEvenIdx", RODATA|NOPTR)}
	for j := 0; j < 16; j++ {
		DATA(4*j, U32(2*j))
	}
	idx[1] = GLOBL("dwOddIdx", RODATA|NOPTR)
	for j := 0; j < 16; j++ {
		DATA(4*j, U32(2*j+1))
	}
	genDWFill("dwFillAVX512", zmm, 16)
	genDWFill("dwFillAVX2", ymm, 8)
	for _, k := range []int{3, 5} {
		for _, s := range []int{1, 2} {
			// Split accumulators measured 0–7 % faster at stride 1 (most on
			// 7- and 14-wide planes) and no better at stride 2, whose
			// gathers, not FMA latency, bound it.
			nacc := map[int]int{1: k, 2: 1}[s]
			genDWPlane(dwPlane{name: fmt.Sprintf("dwK%dS%dAVX512", k, s), k: k, stride: s, width: 16, vec: zmm, nacc: nacc}, idx)
			genDWPlane(dwPlane{name: fmt.Sprintf("dwK%dS%dAVX2", k, s), k: k, stride: s, width: 8, vec: ymm, nacc: nacc}, idx)
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
//	o[r][j] = clamp(init + Σ_{kh,kw} w[kh·k+kw]·s[r·spitch + kh·rowstep + (stride·j + kw)·4], lo, hi)
//
// where init is ep[0] (the channel's bias), or the current o[r][j] when
// accum != 0 (the backward pass adds into the input gradient), and clamp
// is min(hi, max(lo, v)) with lo = ep[1], hi = ep[2], keeping a NaN v (the
// operand order of MAXPS/MINPS returns the second source when unordered).
// The last partial vector of each row is stored under a mask (mask is
// the k-register bit pattern on AVX-512, a pointer to 8 lane masks on
// AVX2); loads are never masked, so s must hold readable floats up to
// 2·width past the last tap of the last row (scratch slack), whose
// products land only in masked-off lanes.
//
// Stride 2 reads two adjacent vectors per tap and keeps the even or odd
// lanes (AVX-512: one VPERMT2PS with the second table straight from
// memory; AVX2: VSHUFPS then VPERMPD), so the input needs no
// de-interleaving copy. Weights, bias and bounds live in registers for the
// whole plane (AVX2 5×5: weights are broadcast from memory per tap, 16
// ymm registers being too few).
func genDWPlane(d dwPlane, idx [2]Mem) {
	avx512 := d.width == 16
	sig := "func(o, s, w, ep *float32, rows, ow, spitch, rowstep, accum, mask int)"
	maskDoc := "mask holds the tail's k-register bits"
	if !avx512 {
		sig = "func(o, s, w, ep *float32, rows, ow, spitch, rowstep, accum int, mask *int32)"
		maskDoc = "mask points to the tail's 8 lane masks"
	}
	TEXT(d.name, NOSPLIT, sig)
	Doc(fmt.Sprintf("%s computes rows×ow outputs of a %d×%d stride-%d depthwise filter from a zero-padded plane, with the bias (or accumulation) and clamp fused; %s.", d.name, d.k, d.k, d.stride, maskDoc))
	Pragma("noescape")

	v := d.vec
	bias, lo, hi, acc, tmp, aux, aux2 := v[0], v[1], v[2], v[3], v[4], v[5], v[6]
	taps := d.k * d.k
	wreg := v[7:]
	inReg := len(wreg) >= taps
	// Extra accumulators from the registers the weights leave free: the
	// taps of kernel row kh go to accs[kh mod len(accs)], which are summed
	// before the clamp, so a vector's dependent FMA chain is k taps long
	// instead of k² (4-cycle FMA latency × 9 or 25 would otherwise bound
	// narrow rows, where there are few independent vectors in flight).
	free := wreg
	if inReg {
		free = wreg[taps:]
	}
	if d.stride == 1 {
		free = append([]reg.VecPhysical{tmp}, free...) // no gather temp at stride 1
		if inReg {
			free = append(free, aux)
		}
	}
	accs := append([]reg.VecPhysical{acc}, free[:min(len(free), d.nacc-1)]...)

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
	var idxReg [2]reg.VecPhysical
	if avx512 {
		m := GP64()
		Load(Param("mask"), m)
		KMOVW(m.As32(), reg.K1)
		if d.stride == 2 {
			idxReg = [2]reg.VecPhysical{aux, aux2}
			VMOVUPS(idx[0], aux)
			VMOVUPS(idx[1], aux2)
		}
	} else {
		m := Load(Param("mask"), GP64())
		VMOVUPS(Mem{Base: m}, aux2)
	}
	accum, err := Param("accum").Resolve()
	check(err)
	spitch, err := Param("spitch").Resolve()
	check(err)
	owm, err := Param("ow").Resolve()
	check(err)

	rp0, rp3, n := GP64(), GP64(), GP64()
	rowMem := func(kh, disp int) Mem {
		switch kh {
		case 0:
			return Mem{Base: rp0, Disp: disp}
		case 1:
			return Mem{Base: rp0, Index: rs, Scale: 1, Disp: disp}
		case 2:
			return Mem{Base: rp0, Index: rs, Scale: 2, Disp: disp}
		case 3:
			return Mem{Base: rp3, Disp: disp}
		case 4:
			return Mem{Base: rp0, Index: rs, Scale: 4, Disp: disp}
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
			VMASKMOVPS(Mem{Base: op}, aux2, acc)
		}
		Label(lbl + "_taps")
		for _, a := range accs[1:] {
			if d.width == 16 {
				VPXORD(a, a, a)
			} else {
				VXORPS(a, a, a)
			}
		}
		for kh := 0; kh < d.k; kh++ {
			for kw := 0; kw < d.k; kw++ {
				t := kh*d.k + kw
				var wv reg.VecPhysical
				if inReg {
					wv = wreg[t]
				} else {
					VBROADCASTSS(Mem{Base: wp, Disp: 4 * t}, aux)
					wv = aux
				}
				if d.stride == 1 {
					VFMADD231PS(rowMem(kh, 4*kw), wv, accs[kh%len(accs)])
					continue
				}
				disp := 8 * (kw / 2)
				VMOVUPS(rowMem(kh, disp), tmp)
				if avx512 {
					VPERMT2PS(rowMem(kh, disp+4*d.width), idxReg[kw%2], tmp)
				} else {
					VSHUFPS(Imm(map[int]uint64{0: 0x88, 1: 0xDD}[kw%2]), rowMem(kh, disp+4*d.width), tmp, tmp)
					VPERMPD(Imm(0xD8), tmp, tmp)
				}
				VFMADD231PS(tmp, wv, accs[kh%len(accs)])
			}
		}
		switch len(accs) {
		case 1:
		case 2:
			VADDPS(accs[1], acc, acc)
		default: // pairwise: two adds deep
			for i := 2; i+1 < len(accs); i += 2 {
				VADDPS(accs[i+1], accs[i], accs[i])
			}
			VADDPS(accs[1], acc, acc)
			for i := 2; i < len(accs); i += 2 {
				VADDPS(accs[i], acc, acc)
			}
		}
		VMAXPS(acc, lo, acc)
		VMINPS(acc, hi, acc)
		switch {
		case !tail:
			VMOVUPS(acc, Mem{Base: op})
		case avx512:
			VMOVUPS(acc, reg.K1, Mem{Base: op})
		default:
			VMASKMOVPS(acc, aux2, Mem{Base: op})
		}
	}

	TESTQ(rows, rows)
	JZ(LabelRef(d.name + "_done"))
	Label(d.name + "_row")
	MOVQ(s, rp0)
	if d.k > 3 {
		LEAQ(Mem{Base: rp0, Index: rs, Scale: 2}, rp3)
		ADDQ(rs, rp3)
	}
	MOVQ(owm.Addr, n)
	Label(d.name + "_vec")
	CMPQ(n, Imm(uint64(d.width)))
	JL(LabelRef(d.name + "_tailcheck"))
	step(false)
	adv := U32(4 * d.width * d.stride)
	ADDQ(adv, rp0)
	if d.k > 3 {
		ADDQ(adv, rp3)
	}
	ADDQ(U32(4*d.width), op)
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
