package main

import (
	. "github.com/mmcloughlin/avo/build"
	. "github.com/mmcloughlin/avo/operand"
	"github.com/mmcloughlin/avo/reg"
)

// genWinograd emits the input and output transforms of the Winograd
// convolution F(2×2, 3×3) (Lavin & Gray, "Fast Algorithms for
// Convolutional Neural Networks", CVPR 2016), sixteen tiles per vector:
// a tile's values sit in the same lane of sixteen registers, one register
// per transform element, so the transforms are plain vector adds. The
// stride-2 overlap of the 4×4 input tiles is taken apart with VPERMT2PS
// (even and odd columns of a row); the 2×2 output tiles are put together
// with it. The arithmetic is the one of kernel.winogradInputGo and
// winogradOutputGo, operation for operation, so both paths round alike.
func genWinograd() {
	genWinogradInput()
	il0 := laneTable("winoInterleaveLo", func(j int) int { return j/2 + 16*(j%2) })
	il1 := laneTable("winoInterleaveHi", func(j int) int { return 8 + j/2 + 16*(j%2) })
	genWinogradOutput(false, il0, il1)
	genWinogradOutput(true, il0, il1)
	genTranspose(false, false)
	genTranspose(true, false)
	genTranspose(true, true)
}

// winoStores returns the address of transform element ξ = 4a+b of the
// current chunk: bases[a] points at element 4a, s holds the element
// stride in bytes and s3 three times it.
func winoAddr(bases [4]reg.GPVirtual, s, s3 reg.GPVirtual, a, b int) Mem {
	return stepAt(bases[a], s, s3, b, 0)
}

// winoBases loads the element stride param (floats) as bytes into s and
// 3·s into s3, and sets bases[a] = p + 4a·s.
func winoBases(p reg.GPVirtual, stride string) (bases [4]reg.GPVirtual, s, s3 reg.GPVirtual) {
	s = loadGP(stride)
	SHLQ(U8(2), s)
	s3 = GP64()
	LEAQ(Mem{Base: s, Index: s, Scale: 2}, s3)
	s4 := GP64()
	MOVQ(s, s4)
	SHLQ(U8(2), s4)
	for a := range bases {
		bases[a] = GP64()
		if a == 0 {
			MOVQ(p, bases[a])
			continue
		}
		LEAQ(Mem{Base: bases[a-1], Index: s4, Scale: 1}, bases[a])
	}
	return bases, s, s3
}

// tailLoop emits the chunk loop of a transform: body(false) for each of
// chunks full chunks, then body(true) once when the tail masks (already in
// the K registers, zero for none) select something.
func tailLoop(name string, chunks, tail reg.GPVirtual, body func(masked bool)) {
	Label(name + "_loop")
	TESTQ(chunks, chunks)
	JZ(LabelRef(name + "_tail"))
	body(false)
	DECQ(chunks)
	JMP(LabelRef(name + "_loop"))
	Label(name + "_tail")
	TESTQ(tail, tail)
	JZ(LabelRef(name + "_done"))
	body(true)
	Label(name + "_done")
	VZEROUPPER()
	RET()
}

// genWinogradInput emits winogradInputAVX512: for each of channels
// channels ch, the sixteen 4×4 input tiles d[r][c] = row_r[off + 2j + c]
// (row_r = rows[r] + ch·strides[r], off a signed offset in floats, j < 16)
// give V = Bᵀ·d·B, stored as element ξ = 4a+b of tile j at
// v[ch·vc + ξ·vstride + j]. Looping over the channels here, not in Go,
// keeps the per-call work (masks, row slices, the call) out of the
// per-channel path: it was as much CPU as the transform itself. Every load is zero-masked: masks holds four 16-bit
// lane masks, for the loads at floats 0, 16, 2 and 18 from a chunk's
// start (zero lanes read as 0, and never fault, so a row's padding costs
// no copy); every store is masked by smask. The caller passes masks of all
// ones for chunks that lie inside the rows.
func genWinogradInput() {
	ev := laneTable("winoEvenLanes", func(j int) int { return 2 * j })
	od := laneTable("winoOddLanes", func(j int) int { return 2*j + 1 })
	name := "winogradInputAVX512"
	TEXT(name, NOSPLIT, "func(channels int, masks, smask uint64, rows *[4]*float32, strides *[4]int, off int, v *float32, vstride, vc int)")
	Doc(name + " computes the F(2×2, 3×3) input transform of 16 tiles of each of channels channels, read from four rows at off + 2j (row r of channel ch strides[r]·ch floats on), loads zero-masked by masks (four 16-bit masks, for the loads at floats 0, 16, 2, 18) and stores masked by smask; channel ch's transforms start vc·ch floats on.")
	Pragma("noescape")
	chunks := loadGP("channels")
	masks := loadGP("masks")
	for i, k := range []reg.Register{reg.K1, reg.K2, reg.K3, reg.K4} {
		if i > 0 {
			SHRQ(U8(16), masks)
		}
		KMOVW(masks.As32(), k)
	}
	sm := loadGP("smask")
	KMOVW(sm.As32(), reg.K5)
	rp := loadGP("rows")
	off := loadGP("off")
	var rows [4]reg.GPVirtual
	for r := range rows {
		rows[r] = GP64()
		MOVQ(Mem{Base: rp, Disp: 8 * r}, rows[r])
		LEAQ(Mem{Base: rows[r], Index: off, Scale: 4}, rows[r])
	}
	sp := loadGP("strides")
	vp := loadGP("v")
	bases, s, s3 := winoBases(vp, "vstride")
	vc := loadGP("vc")
	SHLQ(U8(2), vc)

	evr, odr := reg.Z30, reg.Z31
	VMOVUPS(ev, evr)
	VMOVUPS(od, odr)
	// t[r][b]: row r after the column transform, in Z0 … Z15.
	t := func(r, b int) reg.VecPhysical { return zmmN(4*r + b) }
	lo, hi, tmp := zmmN(21), zmmN(22), zmmN(16)
	Label(name + "_loop")
	TESTQ(chunks, chunks)
	JZ(LabelRef(name + "_done"))
	for r, p := range rows {
		d0, d1, d2, d3 := t(r, 0), t(r, 1), t(r, 2), t(r, 3)
		// d0 … d3 = row[2j], row[2j+1], row[2j+2], row[2j+3] for the 16
		// tiles: the even and odd lanes of floats 0–31 and of 2–33.
		VMOVUPS_Z(Mem{Base: p}, reg.K1, lo)
		VMOVUPS_Z(Mem{Base: p, Disp: 64}, reg.K2, hi)
		VMOVAPS(lo, d0)
		VPERMT2PS(hi, evr, d0)
		VMOVAPS(lo, d1)
		VPERMT2PS(hi, odr, d1)
		VMOVUPS_Z(Mem{Base: p, Disp: 8}, reg.K3, lo)
		VMOVUPS_Z(Mem{Base: p, Disp: 72}, reg.K4, hi)
		VMOVAPS(lo, d2)
		VPERMT2PS(hi, evr, d2)
		VMOVAPS(lo, d3)
		VPERMT2PS(hi, odr, d3)
		// t0 = d0−d2, t1 = d1+d2, t2 = d2−d1, t3 = d1−d3.
		VSUBPS(d2, d0, d0)
		VSUBPS(d3, d1, d3)
		VADDPS(d2, d1, tmp)
		VSUBPS(d1, d2, d2)
		VMOVAPS(tmp, d1)
	}
	// V[0][b] = t0−t2, V[1][b] = t1+t2, V[2][b] = t2−t1, V[3][b] = t1−t3.
	for b := 0; b < 4; b++ {
		out := [4]reg.VecPhysical{zmmN(17), zmmN(18), zmmN(19), zmmN(20)}
		VSUBPS(t(2, b), t(0, b), out[0])
		VADDPS(t(2, b), t(1, b), out[1])
		VSUBPS(t(1, b), t(2, b), out[2])
		VSUBPS(t(3, b), t(1, b), out[3])
		for a, o := range out {
			VMOVUPS(o, reg.K5, winoAddr(bases, s, s3, a, b))
		}
	}
	for r, p := range rows {
		tmp := GP64()
		MOVQ(Mem{Base: sp, Disp: 8 * r}, tmp)
		LEAQ(Mem{Base: p, Index: tmp, Scale: 4}, p)
	}
	for _, b := range bases {
		ADDQ(vc, b)
	}
	DECQ(chunks)
	JMP(LabelRef(name + "_loop"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}

// genWinogradOutput emits winogradOutputAVX512 (winogradOutputResAVX512
// with residual): for chunks of sixteen tiles, then one masked chunk, the
// elements m[ξ·mstride + j] of tile j give Y = Aᵀ·M·A, a 2×2 output block
// at rows 0 and 1 (row 1 only when two is not zero), columns 2j and 2j+1
// of y (rows ldy apart); each value becomes min(hi, max(lo, (v+bias)+r))
// (without the residual r: min(hi, max(lo, v+bias))), rounded in that
// order as the convolution epilogue (BiasAddClamp) rounds. masks: bits
// 0–15 the tiles of the tail chunk, bits 16–31 and 32–47 its output
// columns 0–15 and 16–31; zero for no tail. il0 and il1 are the lane
// tables that interleave the two columns of a tile row.
func genWinogradOutput(residual bool, il0, il1 Mem) {
	name, sig := "winogradOutputAVX512", "func(chunks int, masks uint64, m *float32, mstride int, y *float32, ldy int, two int, bias, lo, hi float32)"
	if residual {
		name, sig = "winogradOutputResAVX512", "func(chunks int, masks uint64, m *float32, mstride int, y *float32, r *float32, ldy int, two int, bias, lo, hi float32)"
	}
	TEXT(name, NOSPLIT, sig)
	Doc(name + " computes the F(2×2, 3×3) output transform and the convolution epilogue of 16·chunks tiles, then of the masked tail chunk.")
	Pragma("noescape")
	chunks := loadGP("chunks")
	masks := loadGP("masks")
	KMOVW(masks.As32(), reg.K3)
	mk := GP64()
	MOVQ(masks, mk)
	SHRQ(U8(16), mk)
	KMOVW(mk.As32(), reg.K1)
	SHRQ(U8(16), mk)
	KMOVW(mk.As32(), reg.K2)
	mp := loadGP("m")
	bases, s, s3 := winoBases(mp, "mstride")
	y := loadGP("y")
	var rp reg.GPVirtual
	if residual {
		rp = loadGP("r")
	}
	ldy := loadGP("ldy")
	SHLQ(U8(2), ldy)
	two := loadGP("two")
	bv, lv, hv := zmmN(26), zmmN(27), zmmN(28)
	for i, p := range []string{"bias", "lo", "hi"} {
		a, err := Param(p).Resolve()
		check(err)
		VBROADCASTSS(a.Addr, []reg.VecPhysical{bv, lv, hv}[i])
	}
	i0, i1 := zmmN(29), zmmN(30)
	VMOVUPS(il0, i0)
	VMOVUPS(il1, i1)
	mv := func(a, b int) reg.VecPhysical { return zmmN(4*a + b) }
	tailLoop(name, chunks, masks, func(masked bool) {
		for a := 0; a < 4; a++ {
			for b := 0; b < 4; b++ {
				if masked {
					VMOVUPS_Z(winoAddr(bases, s, s3, a, b), reg.K3, mv(a, b))
				} else {
					VMOVUPS(winoAddr(bases, s, s3, a, b), mv(a, b))
				}
			}
		}
		// s0[b] = (m0b+m1b)+m2b in mv(0,b); s1[b] = (m1b−m2b)−m3b in mv(2,b).
		for b := 0; b < 4; b++ {
			VADDPS(mv(1, b), mv(0, b), mv(0, b))
			VADDPS(mv(2, b), mv(0, b), mv(0, b))
			VSUBPS(mv(2, b), mv(1, b), mv(2, b))
			VSUBPS(mv(3, b), mv(2, b), mv(2, b))
		}
		for i, row := range []int{0, 2} {
			s0, s1, s2, s3v := mv(row, 0), mv(row, 1), mv(row, 2), mv(row, 3)
			y0, y1, lov := zmmN(16+3*i), zmmN(17+3*i), zmmN(18+3*i)
			// y0 = (s0+s1)+s2, y1 = (s1−s2)−s3, each plus the bias.
			VADDPS(s1, s0, y0)
			VADDPS(s2, y0, y0)
			VSUBPS(s2, s1, y1)
			VSUBPS(s3v, y1, y1)
			VADDPS(bv, y0, y0)
			VADDPS(bv, y1, y1)
			// Columns 2j, 2j+1 side by side: lov the first 16, y0 the rest.
			VMOVAPS(y0, lov)
			VPERMT2PS(y1, i0, lov)
			VPERMT2PS(y1, i1, y0)
		}
		for i := 0; i < 2; i++ {
			if i == 1 {
				TESTQ(two, two)
				JZ(LabelRef(name + labelSuffix(masked) + "_one"))
			}
			halves := [2]reg.VecPhysical{zmmN(18 + 3*i), zmmN(16 + 3*i)}
			ks := [2]reg.Register{reg.K1, reg.K2}
			at := func(base reg.GPVirtual, h int) Mem {
				m := Mem{Base: base, Disp: 64 * h}
				if i == 1 {
					m.Index, m.Scale = ldy, 1
				}
				return m
			}
			for h, v := range halves {
				if residual {
					if masked {
						VADDPS(at(rp, h), v, ks[h], v)
					} else {
						VADDPS(at(rp, h), v, v)
					}
				}
				VMAXPS(v, lv, v)
				VMINPS(v, hv, v)
				if masked {
					VMOVUPS(v, ks[h], at(y, h))
				} else {
					VMOVUPS(v, at(y, h))
				}
			}
		}
		Label(name + labelSuffix(masked) + "_one")
		for _, b := range bases {
			ADDQ(U8(64), b)
		}
		ADDQ(Imm(128), y)
		if residual {
			ADDQ(Imm(128), rp)
		}
	})
}

func labelSuffix(masked bool) string {
	if masked {
		return "_m"
	}
	return "_f"
}

// loadGP loads the integer or pointer parameter name into a new register.
func loadGP(name string) reg.GPVirtual {
	r := GP64()
	Load(Param(name), r)
	return r
}

// zmmN is the n-th AVX-512 register.
func zmmN(n int) reg.VecPhysical {
	return []reg.VecPhysical{
		reg.Z0, reg.Z1, reg.Z2, reg.Z3, reg.Z4, reg.Z5, reg.Z6, reg.Z7,
		reg.Z8, reg.Z9, reg.Z10, reg.Z11, reg.Z12, reg.Z13, reg.Z14, reg.Z15,
		reg.Z16, reg.Z17, reg.Z18, reg.Z19, reg.Z20, reg.Z21, reg.Z22, reg.Z23,
		reg.Z24, reg.Z25, reg.Z26, reg.Z27, reg.Z28, reg.Z29, reg.Z30, reg.Z31,
	}[n]
}

// genTranspose emits transpose16AVX512: n blocks of 16×16 floats, block b
// of src (rows lds apart, columns 16b … 16b+15) written transposed to rows
// 16b … 16b+15 of dst (ldd apart). The 16 rows go through four rounds of
// in-register shuffles (32-bit and 64-bit interleaves within 128-bit lanes,
// then two rounds of 128-bit lane shuffles), 64 shuffles per block. With
// epilogue (transpose16EpAVX512, and transpose16EpResAVX512 with residual)
// each output row j then becomes min(hi, max(lo, (v + bias[j·bstep]) +
// res_j)) as it is stored, rounded in that order as BiasAddClamp does
// (bstep 0 or 1: one bias for all rows, or one per row).
func genTranspose(epilogue, residual bool) {
	name, sig := "transpose16AVX512", "func(n int, src *float32, lds int, dst *float32, ldd int)"
	doc := name + " writes n 16×16 blocks of src transposed into dst: dst[(16b+j)·ldd + i] = src[i·lds + 16b + j] for i, j < 16, b < n."
	switch {
	case residual:
		name, sig = "transpose16EpResAVX512", "func(n int, src *float32, lds int, dst, res *float32, ldd int, bias *float32, bstep int, lo, hi float32)"
		doc = name + " is transpose16AVX512 with the convolution epilogue: dst row j = min(hi, max(lo, (row + bias[j·bstep]) + res row j)), res laid out like dst."
	case epilogue:
		name, sig = "transpose16EpAVX512", "func(n int, src *float32, lds int, dst *float32, ldd int, bias *float32, bstep int, lo, hi float32)"
		doc = name + " is transpose16AVX512 with the convolution epilogue: dst row j = min(hi, max(lo, row + bias[j·bstep]))."
	}
	TEXT(name, NOSPLIT, sig)
	Doc(doc)
	Pragma("noescape")
	n := loadGP("n")
	src := loadGP("src")
	lds := loadGP("lds")
	SHLQ(U8(2), lds)
	dst := loadGP("dst")
	var res, bp, bs reg.GPVirtual
	if residual {
		res = loadGP("res")
	}
	ldd := loadGP("ldd")
	SHLQ(U8(2), ldd)
	if epilogue {
		bp = loadGP("bias")
		bs = loadGP("bstep")
		SHLQ(U8(2), bs)
	}
	lds3, ldd3 := GP64(), GP64()
	LEAQ(Mem{Base: lds, Index: lds, Scale: 2}, lds3)
	LEAQ(Mem{Base: ldd, Index: ldd, Scale: 2}, ldd3)
	r := func(i int) reg.VecPhysical { return zmmN(i) }
	t := func(i int) reg.VecPhysical { return zmmN(16 + i) }
	// rows visits rows 0 … 15 of a block at base: f(i, address), with p
	// stepping four rows between groups of four (it ends at row 12); q,
	// when given, walks a second array laid out alike in step.
	p, q := GP64(), GP64()
	rows := func(base, other, ld, ld3 reg.GPVirtual, f func(i int, m, mo Mem)) {
		MOVQ(base, p)
		if other != nil {
			MOVQ(other, q)
		}
		for i := 0; i < 16; i++ {
			if i > 0 && i%4 == 0 {
				LEAQ(Mem{Base: p, Index: ld, Scale: 4}, p)
				if other != nil {
					LEAQ(Mem{Base: q, Index: ld, Scale: 4}, q)
				}
			}
			f(i, stepAt(p, ld, ld3, i%4, 0), stepAt(q, ld, ld3, i%4, 0))
		}
	}
	Label(name + "_loop")
	TESTQ(n, n)
	JZ(LabelRef(name + "_done"))
	rows(src, nil, lds, lds3, func(i int, m, _ Mem) { VMOVUPS(m, r(i)) })
	for i := 0; i < 16; i += 2 {
		VUNPCKLPS(r(i+1), r(i), t(i))
		VUNPCKHPS(r(i+1), r(i), t(i+1))
	}
	// u[4g+q]: rows 4g … 4g+3 of column 4ℓ+q in 128-bit lane ℓ.
	for g := 0; g < 4; g++ {
		a, b, c, d := t(4*g), t(4*g+1), t(4*g+2), t(4*g+3)
		VUNPCKLPD(c, a, r(4*g))
		VUNPCKHPD(c, a, r(4*g+1))
		VUNPCKLPD(d, b, r(4*g+2))
		VUNPCKHPD(d, b, r(4*g+3))
	}
	for q := 0; q < 4; q++ {
		VSHUFF32X4(U8(0x44), r(4+q), r(q), t(4*q))      // lanes 0,1 of rows 0–3 and 4–7
		VSHUFF32X4(U8(0xee), r(4+q), r(q), t(4*q+1))    // lanes 2,3
		VSHUFF32X4(U8(0x44), r(12+q), r(8+q), t(4*q+2)) // rows 8–11 and 12–15
		VSHUFF32X4(U8(0xee), r(12+q), r(8+q), t(4*q+3))
	}
	for q := 0; q < 4; q++ {
		lo, hi, lo2, hi2 := t(4*q), t(4*q+1), t(4*q+2), t(4*q+3)
		VSHUFF32X4(U8(0x88), lo2, lo, r(q))    // column q: lane 0 of each quarter
		VSHUFF32X4(U8(0xdd), lo2, lo, r(4+q))  // column 4+q
		VSHUFF32X4(U8(0x88), hi2, hi, r(8+q))  // column 8+q
		VSHUFF32X4(U8(0xdd), hi2, hi, r(12+q)) // column 12+q
	}
	var other reg.GPVirtual
	if residual {
		other = res
	}
	lov, hiv, bv := t(14), t(15), t(13)
	if epilogue {
		for i, nm := range []string{"lo", "hi"} {
			a, err := Param(nm).Resolve()
			check(err)
			VBROADCASTSS(a.Addr, []reg.VecPhysical{lov, hiv}[i])
		}
	}
	rows(dst, other, ldd, ldd3, func(j int, m, mr Mem) {
		if epilogue {
			VBROADCASTSS(Mem{Base: bp}, bv)
			ADDQ(bs, bp)
			VADDPS(bv, r(j), r(j))
			if residual {
				VADDPS(mr, r(j), r(j))
			}
			VMAXPS(r(j), lov, r(j))
			VMINPS(r(j), hiv, r(j))
		}
		VMOVUPS(r(j), m)
	})
	ADDQ(U8(64), src)
	LEAQ(Mem{Base: p, Index: ldd, Scale: 4}, dst) // p is at row 12: the next block starts at row 16
	if residual {
		LEAQ(Mem{Base: q, Index: ldd, Scale: 4}, res)
	}
	DECQ(n)
	JMP(LabelRef(name + "_loop"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}
