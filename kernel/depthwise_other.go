//go:build !amd64

package kernel

// dwPlaneSIMD: no vector kernels off amd64; the Go loop does every plane.
func dwPlaneSIMD(isa ISA, a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	return false
}

// dwFillSIMD: no vector copy off amd64.
func dwFillSIMD(isa ISA, dst, src []float32, rows, n, dpitch, spitch int) bool { return false }
