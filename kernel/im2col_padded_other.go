//go:build !amd64

package kernel

func panelRowsSIMD() bool { return false }

func panelRows(rows int, panel, padded []float32, offs []int32, segs []uint64, strideW int, lanes *[32]int32) {
	panic("unreachable: panelRowsSIMD is false")
}

func panelRowsNarrow(rows int, panel, padded []float32, offs []int32, segs []uint64, nr int) {
	panic("unreachable: panelRowsSIMD is false")
}
