package kernel

// Max9 sets dst[j], for every j < len(dst), to the ordered maximum of
// s[0][j] … s[8][j]: the kept value starts at s[0][j] and a later one
// replaces it only when greater. A NaN therefore never replaces the kept
// value and stays once kept, and of equal values (+0 and −0) the first
// stays: the window scan of max-pooling, for a 3×3 window given as nine
// shifted rows in scan order. Each s[i] must hold at least len(dst)
// values, and dst must not overlap them. With AVX-512 sixteen outputs
// take nine loads and eight VMAXPS; a partial last vector is recomputed
// over the last sixteen outputs rather than left to a scalar loop, whose
// compares mispredict on real images.
func Max9(dst []float32, s *[9][]float32) {
	var rows [9][]float32
	for i := range rows {
		rows[i] = s[i][:len(dst)]
	}
	done := vectorWithTail(len(dst), func(from int) int {
		var tail [9][]float32
		for i := range tail {
			tail[i] = rows[i][from:]
		}
		return max9SIMD(dst[from:], &tail)
	})
	max9Go(dst[done:], &rows, done)
}

// vectorWithTail runs the 16-wide vector loop vec(from), which does
// outputs from on, rounded down to a multiple of 16, and returns how many
// it did, over n outputs; a partial last vector is then done again over
// the last sixteen outputs (recomputing some, which is exact because each
// output depends only on the inputs, which dst does not overlap) rather
// than left to the scalar loop, whose compares mispredict on real images.
// It returns how many leading outputs are done; the scalar loop does the
// rest (all of them for n < 16 or without a vector path).
func vectorWithTail(n int, vec func(from int) int) int {
	done := vec(0)
	if done < n && done > 0 && n >= 16 {
		done = n - 16 + vec(n-16)
	}
	return done
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

// Max9Stride2 is Max9 for a 3×3 window at column stride 2 given as its
// three rows: dst[j] is the ordered maximum of r[2j], r[2j+1], r[2j+2]
// for r = rows[0], rows[1], rows[2] in that order. Each row must hold at
// least 2·len(dst)+1 values, and dst must not overlap them. With AVX-512
// the taps are taken apart from unit-stride loads in registers, so no
// de-interleaved copy of the rows is made.
func Max9Stride2(dst []float32, rows *[3][]float32) {
	n := len(dst)
	if n == 0 {
		return
	}
	var r [3][]float32
	for i := range r {
		r[i] = rows[i][:2*n+1]
	}
	done := vectorWithTail(n, func(from int) int {
		var tail [3][]float32
		for i := range tail {
			tail[i] = r[i][2*from:]
		}
		return max9Stride2SIMD(dst[from:], &tail)
	})
	max9Stride2Go(dst[done:], &r, done)
}

// max9Stride2Go is Max9Stride2's loop for dst = the outputs from offset on.
func max9Stride2Go(dst []float32, r *[3][]float32, offset int) {
	for j := range dst {
		x := 2 * (offset + j)
		best := r[0][x]
		for i := range r {
			for t := 0; t < 3; t++ {
				if v := r[i][x+t]; v > best {
					best = v
				}
			}
		}
		dst[j] = best
	}
}

// ArgMax9Stride2 sets at[j] to offs[t] for the tap t (0…8: r[2j], r[2j+1],
// r[2j+2] of rows[0], then of rows[1] and rows[2]) whose value
// Max9Stride2 keeps for output j: the first of the largest, a NaN kept
// when it comes first. offs is typically each tap's offset in the input
// plane, so max-pool's backward pass can route a gradient without the
// scan's mispredicted compares. Rows and overlap are as for Max9Stride2.
func ArgMax9Stride2(at []int32, rows *[3][]float32, offs *[9]int32) {
	n := len(at)
	if n == 0 {
		return
	}
	var r [3][]float32
	for i := range r {
		r[i] = rows[i][:2*n+1]
	}
	done := vectorWithTail(n, func(from int) int {
		var tail [3][]float32
		for i := range tail {
			tail[i] = r[i][2*from:]
		}
		return argMax9Stride2SIMD(at[from:], &tail, offs)
	})
	argMax9Stride2Go(at[done:], &r, offs, done)
}

// argMax9Stride2Go is ArgMax9Stride2's loop for at = the outputs from
// offset on.
func argMax9Stride2Go(at []int32, r *[3][]float32, offs *[9]int32, offset int) {
	for j := range at {
		x := 2 * (offset + j)
		best, t := r[0][x], 0
		for i := range r {
			for k := 0; k < 3; k++ {
				if v := r[i][x+k]; v > best {
					best, t = v, 3*i+k
				}
			}
		}
		at[j] = offs[t]
	}
}
