// Command asmgen writes the amd64 kernels of package kernel with the avo
// assembler generator, one kernel set per run (-set gemm: the SGEMM
// micro-kernels in ../kernel_amd64.s; -set dw: depthwise loops in
// ../depthwise_amd64.s; -set ep: convolution epilogues in
// ../epilogue_amd64.s; -set wino: the Winograd transforms in
// ../winograd_amd64.s; each with its Go declarations). It is its own module
// so that the heedmap build never depends on avo; regenerate everything
// with `go generate ./kernel` (the commands are in ../generate.go).
//
// Each micro-kernel computes one mr×nr register tile of C from a packed A
// micro-panel (k steps of mr values, row index fastest) and a packed B
// micro-panel (k steps of nr values, column index fastest):
//
//	acc[i][j] = Σ_p a[p·mr+i]·b[p·nr+j]
//	C[i·ldc+j] = alpha·acc[i][j] (+ beta·C[i·ldc+j] when load != 0)
//
// The B row of a step is held in vector registers and each A value is
// broadcast and multiplied into a row of accumulators (the outer-product
// formulation of Goto & van de Geijn, "Anatomy of high-performance matrix
// multiplication", ACM TOMS 34(3), 2008; register-tile shapes as in the BLIS
// micro-kernel design of Van Zee & van de Geijn, ACM TOMS 41(3), 2015).
package main

import (
	"flag"
	"fmt"
	"os"

	. "github.com/mmcloughlin/avo/build"
	. "github.com/mmcloughlin/avo/operand"
	"github.com/mmcloughlin/avo/reg"
)

// unroll is how many k steps one loop iteration does: enough to amortise the
// loop counter and pointer bumps, small enough to keep the loop body in the
// op cache.
const unroll = 4

// tile describes one micro-kernel.
type tile struct {
	name  string
	mr    int               // rows of C (broadcast A values)
	nv    int               // vectors per C row
	width int               // float32 lanes per vector
	vec   []reg.VecPhysical // register file, in index order
	doc   string
}

func main() {
	zmm := []reg.VecPhysical{
		reg.Z0, reg.Z1, reg.Z2, reg.Z3, reg.Z4, reg.Z5, reg.Z6, reg.Z7,
		reg.Z8, reg.Z9, reg.Z10, reg.Z11, reg.Z12, reg.Z13, reg.Z14, reg.Z15,
		reg.Z16, reg.Z17, reg.Z18, reg.Z19, reg.Z20, reg.Z21, reg.Z22, reg.Z23,
		reg.Z24, reg.Z25, reg.Z26, reg.Z27, reg.Z28, reg.Z29, reg.Z30, reg.Z31,
	}
	ymm := []reg.VecPhysical{
		reg.Y0, reg.Y1, reg.Y2, reg.Y3, reg.Y4, reg.Y5, reg.Y6, reg.Y7,
		reg.Y8, reg.Y9, reg.Y10, reg.Y11, reg.Y12, reg.Y13, reg.Y14, reg.Y15,
	}
	set := flag.String("set", "gemm", "which kernels to emit: gemm (GEMM micro-kernels and the FMA peak loop), dw (depthwise), ep (epilogues), wino (Winograd transforms)")
	flag.Parse()
	switch *set {
	case "gemm":
		genGEMM(zmm, ymm)
	case "dw":
		genDepthwise(zmm, ymm)
	case "ep":
		genEpilogue(zmm, ymm)
	case "wino":
		genWinograd()
	default:
		fmt.Fprintf(os.Stderr, "asmgen: unknown -set %q\n", *set)
		os.Exit(2)
	}
	Generate()
}

// genGEMM emits the packed SGEMM micro-kernels and the FMA peak loop.
func genGEMM(zmm, ymm []reg.VecPhysical) {
	gen(tile{
		name: "sgemm12x32AVX512", mr: 12, nv: 2, width: 16, vec: zmm,
		doc: "12×32 tile: 24 zmm accumulators, 2 for the B row, 2 for broadcasts.",
	})
	// Edge tiles for the last rows of C when M is not a multiple of 12
	// (64 = 5·12 + 4, 128 = 10·12 + 8): computing them with the 12-row
	// tile wastes up to 11 rows of multiply-adds.
	for _, mr := range []int{8, 4} {
		gen(tile{
			name: fmt.Sprintf("sgemm%dx32AVX512", mr), mr: mr, nv: 2, width: 16, vec: zmm,
			doc: fmt.Sprintf("%d×32 edge tile: %d zmm accumulators.", mr, 2*mr),
		})
	}
	gen(tile{
		name: "sgemm6x16AVX2", mr: 6, nv: 2, width: 8, vec: ymm,
		doc: "6×16 tile: 12 ymm accumulators, 2 for the B row, 2 for broadcasts.",
	})
	genPeak("fmaPeakAVX512", zmm, 24)
	genPeak("fmaPeakAVX2", ymm, 12)
}

// genPeak emits a loop of n·acc independent register FMAs with no memory
// traffic: the machine's attainable FMA rate at the moment, against which
// the benchmarks report the micro-kernels (useful on a shared machine,
// where the absolute rate varies from run to run).
func genPeak(name string, vec []reg.VecPhysical, acc int) {
	TEXT(name, NOSPLIT, "func(n int)")
	Doc(fmt.Sprintf("%s runs n iterations of %d independent FMAs on registers only.", name, acc))
	n := Load(Param("n"), GP64())
	for _, r := range vec[:2+acc] { // zero inputs too: no NaN/denormal operands
		if r.Size() == 64 {
			VPXORD(r, r, r)
		} else {
			VXORPS(r, r, r)
		}
	}
	Label(name + "_loop")
	for _, r := range vec[2 : 2+acc] {
		VFMADD231PS(vec[0], vec[1], r)
	}
	DECQ(n)
	JNZ(LabelRef(name + "_loop"))
	VZEROUPPER()
	RET()
}

// gen emits the packed-A kernel t.name and the direct-A kernel
// t.name+"Direct". The direct variant reads A where it lies (row-major,
// unit stride along k, rows lda apart) instead of from a packed panel:
// for a non-transposed A the packing step would be a strided gather that
// costs about as much as the multiply when n is small, while the broadcast
// loads the kernel makes are scalar anyway, so any row stride serves. Row
// i is addressed as base[i/3] + (i%3)·lda with one base register per three
// rows, using the x86 scaled-index modes ×1 and ×2.
//
// The AVX-512 tiles also get t.name+"DirectStrided", which reads B where
// it lies as well: row p of the B block at b + p·ldb (unit stride along
// n). A pointwise convolution's B is its input (channels × positions), so
// its column slabs need no packing: packing them was about a tenth of a
// MobileNetV2 forward pass at batch 1.
//
// The AVX-512 tiles also get a "KMajor" kernel reading A in place stored k
// step by k step: A(i, p) at a[p·lda + i], the transpose of a row-major
// matrix. A pointwise convolution computed transposed (positions ×
// channels) has exactly that A: its input, channels × positions, so the
// rows of a tile are consecutive positions of each channel plane and
// nothing is lowered or packed.
func gen(t tile) {
	genKernel(t, false, false, false)
	genKernel(t, true, false, false)
	if t.width == 16 {
		genKernel(t, true, true, false)
		genKernel(t, false, false, true)
	}
}

func genKernel(t tile, direct, stridedB, kmajor bool) {
	nr := t.nv * t.width
	name := t.name
	switch {
	case kmajor:
		name += "KMajor"
		TEXT(name, NOSPLIT, "func(k int, a *float32, lda int, b, c *float32, ldc int, alpha, beta float32, load int)")
		Doc(fmt.Sprintf("%s computes a %d×%d tile of C from an A stored k-major, A(i, p) at a[p·lda + i], read in place; %s", name, t.mr, nr, t.doc))
	case stridedB:
		name += "DirectStrided"
		TEXT(name, NOSPLIT, "func(k int, a *float32, lda int, b *float32, ldb int, c *float32, ldc int, alpha, beta float32, load int)")
		Doc(fmt.Sprintf("%s computes a %d×%d tile of C from an unpacked row-major A with row stride lda and an unpacked row-major B with row stride ldb; %s", name, t.mr, nr, t.doc))
	case direct:
		name += "Direct"
		TEXT(name, NOSPLIT, "func(k int, a *float32, lda int, b, c *float32, ldc int, alpha, beta float32, load int)")
		Doc(fmt.Sprintf("%s computes a %d×%d tile of C from an unpacked row-major A with row stride lda; %s", name, t.mr, nr, t.doc))
	default:
		TEXT(name, NOSPLIT, "func(k int, a, b, c *float32, ldc int, alpha, beta float32, load int)")
		Doc(fmt.Sprintf("%s computes a %d×%d tile of C; %s", name, t.mr, nr, t.doc))
	}
	Pragma("noescape")

	bv := t.vec[:t.nv]         // B row
	bc := t.vec[t.nv : t.nv+2] // broadcast A values, alternated
	acc := t.vec[t.nv+2 : t.nv+2+t.mr*t.nv]
	if len(t.vec) < t.nv+2+t.mr*t.nv {
		panic("not enough vector registers for " + t.name)
	}

	k := Load(Param("k"), GP64())
	a := Load(Param("a"), GP64())
	b := Load(Param("b"), GP64())
	// aAt addresses A(i, p) at k step p of the current iteration.
	aAt := func(p, i int) Mem { return Mem{Base: a, Disp: 4 * (p*t.mr + i)} }
	aStep := 4 * t.mr // bytes A advances per k step
	var bases []reg.Register
	if direct {
		lda := Load(Param("lda"), GP64())
		SHLQ(Imm(2), lda)
		lda3 := GP64()
		LEAQ(Mem{Base: lda, Index: lda, Scale: 2}, lda3)
		bases = []reg.Register{a}
		for len(bases)*3 < t.mr {
			r := GP64()
			LEAQ(Mem{Base: bases[len(bases)-1], Index: lda3, Scale: 1}, r)
			bases = append(bases, r)
		}
		aAt = func(p, i int) Mem {
			m := Mem{Base: bases[i/3], Disp: 4 * p}
			if i%3 > 0 {
				m.Index, m.Scale = lda, uint8(i%3)
			}
			return m
		}
		aStep = 4
	}
	var ldaK reg.GPVirtual
	if kmajor {
		var ldaK3 reg.GPVirtual
		ldaK, ldaK3 = strideParam("lda")
		aAt = func(p, i int) Mem { return stepAt(a, ldaK, ldaK3, p, 4*i) }
	}
	// bAt addresses B's row at k step p of the current iteration.
	bAt := func(p, v int) Mem { return Mem{Base: b, Disp: 4 * (p*nr + v*t.width)} }
	advanceB := func(steps int) { ADDQ(U32(4*steps*nr), b) }
	if stridedB {
		ldb, ldb3 := strideParam("ldb")
		bAt = func(p, v int) Mem { return stepAt(b, ldb, ldb3, p, 4*v*t.width) }
		advanceB = func(steps int) {
			if steps == unroll {
				LEAQ(Mem{Base: b, Index: ldb, Scale: unroll}, b)
				return
			}
			ADDQ(ldb, b)
		}
	}
	advanceA := func(steps int) {
		if kmajor {
			if steps == unroll {
				LEAQ(Mem{Base: a, Index: ldaK, Scale: unroll}, a)
				return
			}
			ADDQ(ldaK, a)
			return
		}
		if direct {
			for _, r := range bases {
				ADDQ(U32(aStep*steps), r)
			}
			return
		}
		ADDQ(U32(aStep*steps), a)
	}

	Comment("Zero the accumulators.")
	for _, r := range acc {
		if t.width == 16 {
			VPXORD(r, r, r) // AVX512F; the zmm form of VXORPS needs AVX512DQ
		} else {
			VXORPS(r, r, r)
		}
	}

	step := func(p int) {
		for v := 0; v < t.nv; v++ {
			VMOVUPS(bAt(p, v), bv[v])
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
	advanceB(unroll)
	SUBQ(Imm(unroll), k)
	JMP(LabelRef(name + "_unrolled"))

	Label(name + "_tail")
	TESTQ(k, k)
	JZ(LabelRef(name + "_store"))
	step(0)
	advanceA(1)
	advanceB(1)
	DECQ(k)
	JMP(LabelRef(name + "_tail"))

	Label(name + "_store")
	alpha, beta := t.vec[0], t.vec[1] // B row registers are free now
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

// strideParam loads the row-stride parameter name (in floats) into ld as
// bytes, and 3·ld into ld3: with base, ld×1, ld×2 and ld3 four consecutive
// rows are addressed without moving the base (stepAt).
func strideParam(name string) (ld, ld3 reg.GPVirtual) {
	ld, ld3 = GP64(), GP64()
	Load(Param(name), ld)
	SHLQ(Imm(2), ld)
	LEAQ(Mem{Base: ld, Index: ld, Scale: 2}, ld3)
	return ld, ld3
}

// stepAt addresses row p (0…3) of rows ld bytes apart from base, disp
// bytes into the row; ld3 holds 3·ld.
func stepAt(base, ld, ld3 reg.Register, p, disp int) Mem {
	m := Mem{Base: base, Disp: disp}
	switch p {
	case 1, 2:
		m.Index, m.Scale = ld, uint8(p)
	case 3:
		m.Index, m.Scale = ld3, 1
	}
	return m
}

func check(err error) {
	if err != nil {
		panic(err)
	}
}
