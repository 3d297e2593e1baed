package kernel

// peakLoop returns the register-only FMA loop for isa and the float32
// operations one iteration performs (accumulators × lanes × 2).
func peakLoop(isa ISA) (run func(int), flopsPerIter float64, ok bool) {
	switch isa {
	case ISAAVX512:
		return fmaPeakAVX512, 24 * 16 * 2, true
	case ISAAVX2:
		return fmaPeakAVX2, 12 * 8 * 2, true
	}
	return nil, 0, false
}
