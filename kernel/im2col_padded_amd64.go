package kernel

import "golang.org/x/sys/cpu"

func panelRowsSIMD() bool { return cpu.X86.HasAVX512F }

// panelRows runs panelRowsAVX512 over rows panel rows of panel.
func panelRows(rows int, panel, padded []float32, offs []int32, segs []uint64) {
	if rows == 0 {
		return
	}
	panelRowsAVX512(rows, &panel[0], &padded[0], &offs[0], &segs[0], len(segs))
}
