package main

import (
	"fmt"

	. "github.com/mmcloughlin/avo/build"
	. "github.com/mmcloughlin/avo/operand"
	"github.com/mmcloughlin/avo/reg"
)

// genEpilogue emits the vector epilogues applied to convolution outputs.
func genEpilogue(zmm, ymm []reg.VecPhysical) {
	genBiasClamp("biasClampAVX512", zmm, 16)
	genBiasClamp("biasClampAVX2", ymm, 8)
}

// genBiasClamp emits x[j] = min(hi, max(lo, x[j]+bias)) for the first
// n/width·width values of x (the caller finishes the rest): a convolution's
// bias and a fused ReLU (lo = 0, hi = +Inf) or Clip. Four vectors per
// iteration hide the add→max→min latency chain. The operand order of
// VMAXPS/VMINPS makes a NaN in x come out as NaN (the instructions return
// their second source operand when either is NaN), as Go's max and min do.
func genBiasClamp(name string, vec []reg.VecPhysical, width int) {
	TEXT(name, NOSPLIT, "func(n int, x *float32, bias, lo, hi float32)")
	Doc(fmt.Sprintf("%s sets x[j] = min(hi, max(lo, x[j]+bias)) for j < n rounded down to %d.", name, width))
	Pragma("noescape")
	n := Load(Param("n"), GP64())
	x := Load(Param("x"), GP64())
	b, l, h := vec[0], vec[1], vec[2]
	for i, p := range []string{"bias", "lo", "hi"} {
		m, err := Param(p).Resolve()
		check(err)
		VBROADCASTSS(m.Addr, []reg.VecPhysical{b, l, h}[i])
	}
	const unrollEp = 4
	v := vec[3 : 3+unrollEp]
	Label(name + "_loop4")
	CMPQ(n, Imm(uint64(unrollEp*width)))
	JL(LabelRef(name + "_loop1"))
	for i := range v {
		VADDPS(Mem{Base: x, Disp: 4 * width * i}, b, v[i])
	}
	for i := range v {
		VMAXPS(v[i], l, v[i])
	}
	for i := range v {
		VMINPS(v[i], h, v[i])
	}
	for i := range v {
		VMOVUPS(v[i], Mem{Base: x, Disp: 4 * width * i})
	}
	ADDQ(U32(4*width*unrollEp), x)
	SUBQ(Imm(uint64(width*unrollEp)), n)
	JMP(LabelRef(name + "_loop4"))
	Label(name + "_loop1")
	CMPQ(n, Imm(uint64(width)))
	JL(LabelRef(name + "_done"))
	VADDPS(Mem{Base: x}, b, v[0])
	VMAXPS(v[0], l, v[0])
	VMINPS(v[0], h, v[0])
	VMOVUPS(v[0], Mem{Base: x})
	ADDQ(U32(4*width), x)
	SUBQ(Imm(uint64(width)), n)
	JMP(LabelRef(name + "_loop1"))
	Label(name + "_done")
	VZEROUPPER()
	RET()
}
