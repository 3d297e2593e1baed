package main

import (
	"fmt"

	. "github.com/mmcloughlin/avo/build"
	. "github.com/mmcloughlin/avo/operand"
	"github.com/mmcloughlin/avo/reg"
)

// genWide emits the tap-offset micro-kernels of the wide-grid convolution
// (Packed.SgemmWide): A is read in place as by the Direct kernels, and the
// B row of k step p is the nr consecutive values at b + offs[p], so a
// stride-1 convolution reads its zero-padded input directly instead of a
// lowered, packed copy of it. The edge tiles (8 and 4 rows) serve the last
// rows of 64- and 128-channel layers as in the gemm set.
func genWide(zmm []reg.VecPhysical) {
	for _, mr := range []int{12, 8, 4} {
		genWideKernel(tile{
			name: fmt.Sprintf("sgemm%dx32AVX512Taps", mr), mr: mr, nv: 2, width: 16, vec: zmm,
			doc: fmt.Sprintf("%d×32 tile, %d zmm accumulators.", mr, 2*mr),
		})
	}
}

// genWideKernel is genKernel's direct-A variant with B rows addressed
// through an int32 offset table: per k step one scalar load of the offset
// and nv unaligned vector loads at b + 4·offs[p]. The accumulation order
// (k steps in order, one FMA per step) is the Direct kernel's, so for the
// same B values the result is the same bit for bit.
func genWideKernel(t tile) {
	nr := t.nv * t.width
	name := t.name
	TEXT(name, NOSPLIT, "func(k int, a *float32, lda int, b *float32, offs *int32, c *float32, ldc int, alpha, beta float32, load int)")
	Doc(fmt.Sprintf("%s computes a %d×%d tile of C = A·B for an unpacked row-major A (row stride lda) and B rows at b+offs[p]; %s", name, t.mr, nr, t.doc))
	Pragma("noescape")

	bv := t.vec[:t.nv]
	bc := t.vec[t.nv : t.nv+2]
	acc := t.vec[t.nv+2 : t.nv+2+t.mr*t.nv]

	k := Load(Param("k"), GP64())
	a := Load(Param("a"), GP64())
	b := Load(Param("b"), GP64())
	offs := Load(Param("offs"), GP64())
	lda := Load(Param("lda"), GP64())
	SHLQ(Imm(2), lda)
	lda3 := GP64()
	LEAQ(Mem{Base: lda, Index: lda, Scale: 2}, lda3)
	bases := []reg.Register{a}
	for len(bases)*3 < t.mr {
		r := GP64()
		LEAQ(Mem{Base: bases[len(bases)-1], Index: lda3, Scale: 1}, r)
		bases = append(bases, r)
	}
	aAt := func(p, i int) Mem {
		m := Mem{Base: bases[i/3], Disp: 4 * p}
		if i%3 > 0 {
			m.Index, m.Scale = lda, uint8(i%3)
		}
		return m
	}
	advanceA := func(steps int) {
		for _, r := range bases {
			ADDQ(U32(4*steps), r)
		}
	}
	ox := []reg.Register{GP64(), GP64()}

	Comment("Zero the accumulators.")
	for _, r := range acc {
		VPXORD(r, r, r)
	}

	step := func(p int) {
		o := ox[p%2]
		MOVLQSX(Mem{Base: offs, Disp: 4 * p}, o)
		for v := 0; v < t.nv; v++ {
			VMOVUPS(Mem{Base: b, Index: o, Scale: 4, Disp: 4 * v * t.width}, bv[v])
		}
		for i := 0; i < t.mr; i++ {
			x := bc[i%2]
			VBROADCASTSS(aAt(p, i), x)
			for v := 0; v < t.nv; v++ {
				VFMADD231PS(bv[v], x, acc[i*t.nv+v])
			}
		}
	}

	Comment(fmt.Sprintf("Main loop, %d k steps per iteration.", unroll))
	Label(name + "_unrolled")
	CMPQ(k, Imm(unroll))
	JL(LabelRef(name + "_tail"))
	for p := 0; p < unroll; p++ {
		step(p)
	}
	advanceA(unroll)
	ADDQ(U32(4*unroll), offs)
	SUBQ(Imm(unroll), k)
	JMP(LabelRef(name + "_unrolled"))

	Label(name + "_tail")
	TESTQ(k, k)
	JZ(LabelRef(name + "_store"))
	step(0)
	advanceA(1)
	ADDQ(U32(4), offs)
	DECQ(k)
	JMP(LabelRef(name + "_tail"))

	Label(name + "_store")
	alpha, beta := t.vec[0], t.vec[1]
	am, err := Param("alpha").Resolve()
	check(err)
	bm, err := Param("beta").Resolve()
	check(err)
	VBROADCASTSS(am.Addr, alpha)
	VBROADCASTSS(bm.Addr, beta)
	c := Load(Param("c"), GP64())
	ldc := Load(Param("ldc"), GP64())
	SHLQ(Imm(2), ldc)
	load := Load(Param("load"), GP64())

	for _, r := range acc {
		VMULPS(alpha, r, r)
	}
	TESTQ(load, load)
	JZ(LabelRef(name + "_overwrite"))

	Comment("C = alpha·AB + beta·C")
	for i := 0; i < t.mr; i++ {
		for v := 0; v < t.nv; v++ {
			m := Mem{Base: c, Disp: 4 * v * t.width}
			VFMADD231PS(m, beta, acc[i*t.nv+v])
			VMOVUPS(acc[i*t.nv+v], m)
		}
		if i < t.mr-1 {
			ADDQ(ldc, c)
		}
	}
	VZEROUPPER()
	RET()

	Label(name + "_overwrite")
	Comment("C = alpha·AB; C is not read")
	for i := 0; i < t.mr; i++ {
		for v := 0; v < t.nv; v++ {
			VMOVUPS(acc[i*t.nv+v], Mem{Base: c, Disp: 4 * v * t.width})
		}
		if i < t.mr-1 {
			ADDQ(ldc, c)
		}
	}
	VZEROUPPER()
	RET()
}
