package kernel

import (
	"fmt"

	"golang.org/x/sys/cpu"
)

// Transpose writes the rows×cols matrix src (row stride lds) transposed
// into dst (row stride ldd): dst[j·ldd + i] = src[i·lds + j]. With AVX-512
// it goes by 16×16 blocks held in registers (64 shuffles a block, every
// load and store a whole row of 16); the edges that do not fill a block
// go through a scalar loop. A convolution computed transposed (positions ×
// channels, Packed.SgemmRowPanels) is put back into channel planes with it.
func Transpose(dst []float32, ldd int, src []float32, lds int, rows, cols int) {
	if rows <= 0 || cols <= 0 {
		return
	}
	if len(src) < (rows-1)*lds+cols || len(dst) < (cols-1)*ldd+rows {
		panic(fmt.Sprintf("kernel: Transpose of %d×%d has %d source values (stride %d) and %d destination values (stride %d)", rows, cols, len(src), lds, len(dst), ldd))
	}
	rows16, cols16 := 0, 0
	if cpu.X86.HasAVX512F {
		rows16, cols16 = rows&^15, cols&^15
		for i := 0; i < rows16 && cols16 > 0; i += 16 {
			transpose16(cols16/16, src[i*lds:], lds, dst[i:], ldd)
		}
	}
	transposeGo(dst, ldd, src, lds, 0, rows16, cols16, cols)
	transposeGo(dst, ldd, src, lds, rows16, rows, 0, cols)
}

// transposeGo is Transpose for rows [i0, i1) and columns [j0, j1).
func transposeGo(dst []float32, ldd int, src []float32, lds int, i0, i1, j0, j1 int) {
	for j := j0; j < j1; j++ {
		d := dst[j*ldd:]
		for i := i0; i < i1; i++ {
			d[i] = src[i*lds+j]
		}
	}
}

// TransposeEpilogue is Transpose followed by a convolution's epilogue on
// each destination row j (an output channel): dst[j·ldd + i] = min(hi,
// max(lo, (src[i·lds + j] + b) + res[j·ldd + i])), with b = bias[j] (noBias
// when bias is nil) and the residual term only when res is not nil,
// rounded in that order as BiasClamp and BiasAddClamp round. Applying it
// as each transposed row is stored saves the separate pass over dst.
func TransposeEpilogue(dst []float32, ldd int, src []float32, lds int, rows, cols int, bias []float32, noBias float32, res []float32, lo, hi float32) {
	if rows <= 0 || cols <= 0 {
		return
	}
	if len(src) < (rows-1)*lds+cols || len(dst) < (cols-1)*ldd+rows || (bias != nil && len(bias) < cols) || (res != nil && len(res) < (cols-1)*ldd+rows) {
		panic(fmt.Sprintf("kernel: TransposeEpilogue of %d×%d has %d source values (stride %d), %d destination values (stride %d), %d biases", rows, cols, len(src), lds, len(dst), ldd, len(bias)))
	}
	rows16, cols16 := 0, 0
	if cpu.X86.HasAVX512F {
		rows16, cols16 = rows&^15, cols&^15
		for i := 0; i < rows16 && cols16 > 0; i += 16 {
			var r []float32
			if res != nil {
				r = res[i:]
			}
			transpose16Ep(cols16/16, src[i*lds:], lds, dst[i:], r, ldd, bias, noBias, lo, hi)
		}
	}
	transposeEpilogueGo(dst, ldd, src, lds, 0, rows16, cols16, cols, bias, noBias, res, lo, hi)
	transposeEpilogueGo(dst, ldd, src, lds, rows16, rows, 0, cols, bias, noBias, res, lo, hi)
}

// transposeEpilogueGo is TransposeEpilogue for rows [i0, i1) and columns
// [j0, j1) of src.
func transposeEpilogueGo(dst []float32, ldd int, src []float32, lds int, i0, i1, j0, j1 int, bias []float32, noBias float32, res []float32, lo, hi float32) {
	for j := j0; j < j1; j++ {
		b := noBias
		if bias != nil {
			b = bias[j]
		}
		d := dst[j*ldd:]
		for i := i0; i < i1; i++ {
			v := src[i*lds+j] + b
			if res != nil {
				v += res[j*ldd+i]
			}
			d[i] = min(hi, max(lo, v))
		}
	}
}
