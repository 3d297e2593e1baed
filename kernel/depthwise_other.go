//go:build !amd64

package kernel

// dwVectorShape: no vector kernels off amd64.
func dwVectorShape(isa ISA, a *dwArgs) bool { return false }

// dwFillPhasedSIMD: no vector copy off amd64.
func dwFillPhasedSIMD(isa ISA, ev, od, src []float32, rows, n, dpitch, spitch int) bool {
	return false
}

// dwResolve: no vector path off amd64.
func dwResolve(isa ISA) (ISA, int) { return isa, 0 }

// The vector copies exist on amd64 only; dwResolve keeps dwFiller off
// them here.
func dwFillAVX512(dst, src *float32, rows, n, dpitch, spitch, mask int) { panic("kernel: no AVX-512") }
func dwFillAVX2(dst, src *float32, rows, n, dpitch, spitch int, mask *int32) {
	panic("kernel: no AVX2")
}
func dwFillPhasedAVX512(ev, od, src *float32, rows, n, dpitch, spitch, mask int) {
	panic("kernel: no AVX-512")
}
func dwFillPhasedAVX2(ev, od, src *float32, rows, n, dpitch, spitch int, mload, mev, mod *int32) {
	panic("kernel: no AVX2")
}

// dwPlaneSIMD: no vector kernels off amd64; the Go loop does every plane.
func dwPlaneSIMD(isa ISA, a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	return false
}

// dwVec: no vector kernels off amd64.
type dwVec struct{}

// dwPrepare: no vector kernels off amd64.
func dwPrepare(isa ISA, a *dwArgs) (dwVec, bool) { return dwVec{}, false }

func (v *dwVec) plane(a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) bool {
	return false
}
