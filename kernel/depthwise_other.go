//go:build !amd64

package kernel

// dwVectorShape: no vector kernels off amd64.
func dwVectorShape(isa ISA, a *dwArgs) bool { return false }

// dwFillPhasedSIMD: no vector copy off amd64.
func dwFillPhasedSIMD(isa ISA, ev, od, src []float32, rows, n, dpitch, spitch int) bool {
	return false
}

// dwPlaneSIMD: no vector kernels off amd64; the Go loop does every plane.
func dwPlaneSIMD(isa ISA, a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	return false
}

// dwFillSIMD: no vector copy off amd64.
func dwFillSIMD(isa ISA, dst, src []float32, rows, n, dpitch, spitch int) bool { return false }

// dwVec: no vector kernels off amd64.
type dwVec struct{}

// dwPrepare: no vector kernels off amd64.
func dwPrepare(isa ISA, a *dwArgs) (dwVec, bool) { return dwVec{}, false }

func (v *dwVec) plane(a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	return false
}
