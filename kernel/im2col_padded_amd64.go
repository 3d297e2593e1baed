package kernel

import "golang.org/x/sys/cpu"

func panelRowsSIMD() bool { return cpu.X86.HasAVX512F }

// panelRows runs the AVX-512 panel loop over rows panel rows of panel:
// masked loads for unit column stride, masked gathers otherwise.
func panelRows(rows int, panel, padded []float32, offs []int32, segs []uint64, strideW int, lanes *[32]int32) {
	if rows == 0 {
		return
	}
	if strideW == 1 {
		panelRowsAVX512(rows, &panel[0], &padded[0], &offs[0], &segs[0], len(segs))
		return
	}
	panelRowsGatherAVX512(rows, &panel[0], &padded[0], &offs[0], &segs[0], len(segs), &lanes[0])
}

// panelRowsNarrow runs the AVX-512 loop for panels nr <= 16 wide at unit
// column stride.
func panelRowsNarrow(rows int, panel, padded []float32, offs []int32, segs []uint64, nr int) {
	if rows == 0 {
		return
	}
	_ = panel[rows*nr-1]
	if len(segs) <= 3 {
		var three [3]uint64 // absent segments: zero lane mask
		copy(three[:], segs)
		panelRowsNarrow3AVX512(rows, &panel[0], &padded[0], &offs[0], &three, nr, uint16(1)<<nr-1)
		return
	}
	panelRowsNarrowAVX512(rows, &panel[0], &padded[0], &offs[0], &segs[0], len(segs), nr, uint16(1)<<nr-1)
}
