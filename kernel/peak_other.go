//go:build !amd64

package kernel

// peakLoop: there is no assembly FMA loop off amd64.
func peakLoop(isa ISA) (run func(int), flopsPerIter float64, ok bool) {
	return nil, 0, false
}
