package engine

// Multidirectional (numpy-style) broadcasting, shared by the elementwise
// operators and their backward passes.
//
// Shapes are right-aligned; a dimension of size 1 (or a missing leading
// dimension) stretches to the other operand's size. Instead of materialising
// index arrays, a bcastPlan coalesces adjacent dimensions that broadcast the
// same way for every operand and walks the output in rows: within a row each
// operand advances with stride 1 or 0, so the inner loops stay simple slices
// loops the compiler can bounds-check once.

import (
	"fmt"

	"heedmap/tensor"
)

// broadcastShapes returns the numpy broadcast of shapes, or an error naming
// the first pair of incompatible dimensions.
func broadcastShapes(shapes ...[]int) ([]int, error) {
	rank := 0
	for _, s := range shapes {
		if len(s) > rank {
			rank = len(s)
		}
	}
	out := make([]int, rank)
	for i := range out {
		out[i] = 1
	}
	for _, s := range shapes {
		off := rank - len(s)
		for i, d := range s {
			o := out[off+i]
			switch {
			case d == o || d == 1:
			case o == 1:
				out[off+i] = d
			default:
				return nil, fmt.Errorf("shapes %v are not broadcastable (dimension %d: %d vs %d)", shapes, i-len(s), o, d)
			}
		}
	}
	return out, nil
}

// bcastPlan walks an output shape together with k operands broadcast to it.
type bcastPlan struct {
	n       int     // output elements
	dims    []int   // coalesced output dims; the last one is the row
	strides [][]int // strides[k][d]: element stride of operand k along dims[d] (0 when broadcast)
}

// newBcastPlan prepares the walk of out with operands of the given shapes,
// each of which must broadcast to out.
func newBcastPlan(out []int, ins ...[]int) (*bcastPlan, error) {
	rank := len(out)
	k := len(ins)
	// bcast[k][d]: operand k is broadcast (size 1 or absent) along output dim d.
	type dimInfo struct {
		size  int
		bcast []bool
	}
	var dims []dimInfo
	for d := 0; d < rank; d++ {
		if out[d] == 1 {
			continue // size-1 output dims contribute nothing to the walk
		}
		di := dimInfo{size: out[d], bcast: make([]bool, k)}
		for j, s := range ins {
			if len(s) > rank {
				return nil, fmt.Errorf("shape %v does not broadcast to %v", s, out)
			}
			ad := d - (rank - len(s))
			switch {
			case ad < 0 || s[ad] == 1:
				di.bcast[j] = true
			case s[ad] != out[d]:
				return nil, fmt.Errorf("shape %v does not broadcast to %v", s, out)
			}
		}
		// Merge with the previous dim when every operand behaves alike:
		// then the two dims are one contiguous (or one broadcast) run.
		if len(dims) > 0 {
			prev := &dims[len(dims)-1]
			same := true
			for j := range ins {
				if prev.bcast[j] != di.bcast[j] {
					same = false
					break
				}
			}
			if same {
				prev.size *= di.size
				continue
			}
		}
		dims = append(dims, di)
	}
	if len(dims) == 0 {
		dims = append(dims, dimInfo{size: 1, bcast: make([]bool, k)})
	}
	p := &bcastPlan{n: tensor.Numel(out), dims: make([]int, len(dims)), strides: make([][]int, k)}
	for d := range dims {
		p.dims[d] = dims[d].size
	}
	for j := range ins {
		st := make([]int, len(dims))
		acc := 1
		for d := len(dims) - 1; d >= 0; d-- {
			if dims[d].bcast[j] {
				st[d] = 0
			} else {
				st[d] = acc
				acc *= dims[d].size
			}
		}
		p.strides[j] = st
	}
	return p, nil
}

// rows calls fn for every output row: o is the output offset of the row's
// first element, offs[j] operand j's offset and steps[j] (0 or 1) its stride
// inside the row, n the row length. offs is reused between calls.
func (p *bcastPlan) rows(fn func(o int, offs, steps []int, n int)) {
	if p.n == 0 {
		return
	}
	k := len(p.strides)
	last := len(p.dims) - 1
	n := p.dims[last]
	steps := make([]int, k)
	for j := range steps {
		steps[j] = p.strides[j][last]
	}
	offs := make([]int, k)
	idx := make([]int, last)
	for o := 0; o < p.n; o += n {
		fn(o, offs, steps, n)
		// Advance the odometer over the outer dims.
		for d := last - 1; d >= 0; d-- {
			idx[d]++
			for j := 0; j < k; j++ {
				offs[j] += p.strides[j][d]
			}
			if idx[d] < p.dims[d] {
				break
			}
			for j := 0; j < k; j++ {
				offs[j] -= p.strides[j][d] * idx[d]
			}
			idx[d] = 0
		}
	}
}

// reduceToShape sums g (of shape out) over the dimensions along which an
// operand of shape in was broadcast, the adjoint of broadcasting. It returns
// g itself when no reduction is needed.
func reduceToShape(g []float32, out, in []int) ([]float32, error) {
	if shapeEq(out, in) {
		return g, nil
	}
	p, err := newBcastPlan(out, in)
	if err != nil {
		return nil, err
	}
	acc := make([]float32, tensor.Numel(in))
	p.rows(func(o int, offs, steps []int, n int) {
		a := offs[0]
		if steps[0] == 0 {
			var s float32
			for _, v := range g[o : o+n] {
				s += v
			}
			acc[a] += s
			return
		}
		dst := acc[a : a+n]
		for i, v := range g[o : o+n] {
			dst[i] += v
		}
	})
	return acc, nil
}

// expandF32 materialises x (shape in) broadcast to shape out.
func expandF32(x []float32, in, out []int) ([]float32, error) {
	return expandRows(x, in, out)
}

// expandI64 is expandF32 for integer and boolean data.
func expandI64(x []int64, in, out []int) ([]int64, error) {
	return expandRows(x, in, out)
}

// expandRows is expandF32 for either element type.
func expandRows[T float32 | int64](x []T, in, out []int) ([]T, error) {
	p, err := newBcastPlan(out, in)
	if err != nil {
		return nil, err
	}
	dst := make([]T, tensor.Numel(out))
	p.rows(func(o int, offs, steps []int, n int) {
		if steps[0] == 0 {
			v := x[offs[0]]
			for i := range dst[o : o+n] {
				dst[o+i] = v
			}
			return
		}
		copy(dst[o:o+n], x[offs[0]:offs[0]+n])
	})
	return dst, nil
}
