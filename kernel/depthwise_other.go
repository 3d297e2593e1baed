//go:build !amd64

package kernel

// dwPlaneSIMD: no vector kernels off amd64; the Go loop does every plane.
func dwPlaneSIMD(isa ISA, a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	return false
}
