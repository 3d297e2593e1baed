package kernel

// Max9 sets dst[j], for every j < len(dst), to the ordered maximum of
// s[0][j] … s[8][j]: the kept value starts at s[0][j] and a later one
// replaces it only when greater. A NaN therefore never replaces the kept
// value and stays once kept, and of equal values (+0 and −0) the first
// stays: the window scan of max-pooling, for a 3×3 window given as nine
// shifted rows in scan order. Each s[i] must hold at least len(dst)
// values. With AVX-512 sixteen outputs take nine loads and eight VMAXPS.
func Max9(dst []float32, s *[9][]float32) {
	var rows [9][]float32
	for i := range rows {
		rows[i] = s[i][:len(dst)]
	}
	done := max9SIMD(dst, &rows)
	max9Go(dst[done:], &rows, done)
}

// max9Go is Max9's loop for dst = the outputs from offset on.
func max9Go(dst []float32, s *[9][]float32, offset int) {
	for j := range dst {
		best := s[0][offset+j]
		for i := 1; i < 9; i++ {
			if v := s[i][offset+j]; v > best {
				best = v
			}
		}
		dst[j] = best
	}
}
