package engine

// Shape and data-movement operators: Concat, Split, Slice, Gather,
// Transpose, Squeeze, Unsqueeze, Pad, Expand, Shape, ConstantOfShape.
//
// All of them move elements without arithmetic, so they work on every
// element type. Most are written as "take": a precomputed list of source
// offsets per output element (−1 for a padding value). That costs one int
// per output element but lets forward (gather) and backward (scatter-add)
// share one plan and one loop for any rank, which matters more here than
// raw speed: these ops sit on small shape tensors or run once per pass.
// Concat, Split and Gather copy contiguous blocks instead, since they do
// appear on large activations.

import (
	"fmt"
	"math"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("Concat", buildConcat)
	register("Split", buildSplit)
	register("Slice", buildSlice)
	register("Gather", buildGather)
	register("Transpose", buildTranspose)
	register("Squeeze", buildSqueeze)
	register("Unsqueeze", buildUnsqueeze)
	register("Pad", buildPad)
	register("Expand", buildExpand)
	register("Shape", buildShape)
	register("ConstantOfShape", buildConstantOfShape)
}

// ---------------------------------------------------------------------------
// Helpers.

// shDims reads a shape input (as shInts) whose entries must all be
// non-negative dimensions.
func shDims(t *tensor.Tensor, what string) ([]int, error) {
	raw, err := shInts(t, what)
	if err != nil {
		return nil, err
	}
	dims := make([]int, len(raw))
	for i, v := range raw {
		if v < 0 {
			return nil, fmt.Errorf("%s: negative dimension in %v", what, raw)
		}
		dims[i] = int(v)
	}
	return dims, nil
}

// shInts returns the values of an integer tensor (shape inputs, axes,
// indices). A float tensor is an error: ONNX requires int32/int64 there.
func shInts(t *tensor.Tensor, what string) ([]int64, error) {
	if t == nil {
		return nil, nil
	}
	if t.DType == tensor.Float32 {
		return nil, fmt.Errorf("%s must be an integer tensor, got %s", what, t)
	}
	return t.I64, nil
}

// shAxis normalises a possibly negative axis against rank.
func shAxis(axis int64, rank int) (int, error) {
	if axis < -int64(rank) || axis >= int64(rank) {
		return 0, fmt.Errorf("axis %d out of range for rank %d", axis, rank)
	}
	if axis < 0 {
		axis += int64(rank)
	}
	return int(axis), nil
}

// shStrides returns row-major element strides.
func shStrides(shape []int) []int {
	st := make([]int, len(shape))
	acc := 1
	for i := len(shape) - 1; i >= 0; i-- {
		st[i] = acc
		acc *= shape[i]
	}
	return st
}

// shAxisTake builds the offset list for an output whose index along each
// axis d is mapped to source index axes[d][i] (−1: outside the source).
func shAxisTake(src []int, axes [][]int) []int {
	st := shStrides(src)
	cur := []int{0}
	for d, list := range axes {
		next := make([]int, 0, len(cur)*len(list))
		for _, base := range cur {
			for _, a := range list {
				if base < 0 || a < 0 {
					next = append(next, -1)
				} else {
					next = append(next, base+a*st[d])
				}
			}
		}
		cur = next
	}
	return cur
}

// shAxisPlan describes an output whose element at index (i_0, …, i_k)
// reads source offset Σ_d offs[d][i_d], or a fill value when any of those
// terms is negative. Slice, Pad and Transpose are all of this form; walking
// it row by row needs memory per axis, not per element.
type shAxisPlan struct {
	shape []int
	offs  [][]int
}

// newShAxisPlan turns per-axis source indices (−1: outside) into offsets.
func newShAxisPlan(src []int, lists [][]int) *shAxisPlan {
	st := shStrides(src)
	p := &shAxisPlan{shape: make([]int, len(lists)), offs: make([][]int, len(lists))}
	for d, list := range lists {
		p.shape[d] = len(list)
		o := make([]int, len(list))
		for i, a := range list {
			if a < 0 {
				o[i] = -1
			} else {
				o[i] = a * st[d]
			}
		}
		p.offs[d] = o
	}
	return p
}

// rows calls fn for each output row along the last axis: o is the row's
// output offset, base the summed offset of the outer axes (negative when
// the whole row is fill) and last the last axis's offsets.
func (p *shAxisPlan) rows(fn func(o, base int, last []int)) {
	rank := len(p.shape)
	if rank == 0 {
		fn(0, 0, []int{0})
		return
	}
	if tensor.Numel(p.shape) == 0 {
		return
	}
	last := p.offs[rank-1]
	idx := make([]int, rank-1)
	for o := 0; ; o += len(last) {
		base := 0
		for d, i := range idx {
			v := p.offs[d][i]
			if v < 0 || base < 0 {
				base = -1
			} else {
				base += v
			}
		}
		fn(o, base, last)
		d := rank - 2
		for ; d >= 0; d-- {
			idx[d]++
			if idx[d] < p.shape[d] {
				break
			}
			idx[d] = 0
		}
		if d < 0 {
			return
		}
	}
}

// gather materialises the plan over x; fill (fillI for integer data) goes
// where the plan points outside x.
func (p *shAxisPlan) gather(x *tensor.Tensor, fill float32, fillI int64) *tensor.Tensor {
	y := shNewLike(x, p.shape)
	if x.DType == tensor.Float32 {
		shGatherRows(p, y.F32, x.F32, fill)
	} else {
		shGatherRows(p, y.I64, x.I64, fillI)
	}
	return y
}

// shGatherRows is gather for one element type.
func shGatherRows[T float32 | int64](p *shAxisPlan, dst, src []T, fill T) {
	p.rows(func(o, base int, last []int) {
		d := dst[o : o+len(last)]
		for i, lo := range last {
			if base < 0 || lo < 0 {
				d[i] = fill
			} else {
				d[i] = src[base+lo]
			}
		}
	})
}

// scatterAdd is the adjoint of gather: g (of the plan's shape) is added
// into a zero tensor of shape src; fill positions are dropped.
func (p *shAxisPlan) scatterAdd(g []float32, src []int) *tensor.Tensor {
	gx := tensor.New(src...)
	p.rows(func(o, base int, last []int) {
		if base < 0 {
			return
		}
		for i, lo := range last {
			if lo >= 0 {
				gx.F32[base+lo] += g[o+i]
			}
		}
	})
	return gx
}

// shTake gathers x at flat offsets idx into a new tensor of the given shape;
// offset −1 takes fill (fillI for integer tensors).
func shTake(x *tensor.Tensor, shape []int, idx []int, fill float32, fillI int64) *tensor.Tensor {
	if x.DType == tensor.Float32 {
		y := tensor.New(shape...)
		shTakeInto(y.F32, x.F32, idx, fill)
		return y
	}
	y := &tensor.Tensor{DType: x.DType, Shape: append([]int(nil), shape...), I64: make([]int64, len(idx))}
	shTakeInto(y.I64, x.I64, idx, fillI)
	return y
}

// shTakeInto is shTake for one element type.
func shTakeInto[T float32 | int64](dst, src []T, idx []int, fill T) {
	for o, s := range idx {
		if s < 0 {
			dst[o] = fill
		} else {
			dst[o] = src[s]
		}
	}
}

// shScatterAdd is the adjoint of shTake: it adds g[o] to source offset
// idx[o] of a zero tensor of the source shape.
func shScatterAdd(g []float32, idx []int, src []int) *tensor.Tensor {
	gx := tensor.New(src...)
	for o, s := range idx {
		if s >= 0 {
			gx.F32[s] += g[o]
		}
	}
	return gx
}

// shNewLike returns a zero tensor of x's dtype with the given shape.
func shNewLike(x *tensor.Tensor, shape []int) *tensor.Tensor {
	if x.DType == tensor.Float32 {
		return tensor.New(shape...)
	}
	return &tensor.Tensor{DType: x.DType, Shape: append([]int(nil), shape...), I64: make([]int64, tensor.Numel(shape))}
}

// shCopyBlock copies n elements from src[so:] to dst[do:] for either
// element storage.
func shCopyBlock(dst *tensor.Tensor, do int, src *tensor.Tensor, so, n int) {
	if dst.DType == tensor.Float32 {
		copy(dst.F32[do:do+n], src.F32[so:so+n])
	} else {
		copy(dst.I64[do:do+n], src.I64[so:so+n])
	}
}

func shNeed(in []*tensor.Tensor, k int, op string) error {
	if len(in) < k {
		return fmt.Errorf("%s: needs %d inputs, got %d", op, k, len(in))
	}
	for i := 0; i < k; i++ {
		if in[i] == nil {
			return fmt.Errorf("%s: input %d is missing", op, i)
		}
	}
	return nil
}

// shOptional returns in[i] or nil when absent.
func shOptional(in []*tensor.Tensor, i int) *tensor.Tensor {
	if i < len(in) {
		return in[i]
	}
	return nil
}

// ---------------------------------------------------------------------------
// Concat

type concatOp struct{ axis int64 }

func buildConcat(n *onnx.Node, env *Env) (Op, error) {
	if !n.Has("axis") {
		if env.Opset >= 4 {
			return nil, fmt.Errorf("Concat: missing attribute axis")
		}
		return &concatOp{axis: 1}, nil
	}
	return &concatOp{axis: n.Int("axis", 0)}, nil
}

func (c *concatOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if len(in) == 0 || in[0] == nil {
		return nil, fmt.Errorf("Concat: no inputs")
	}
	rank := len(in[0].Shape)
	axis, err := shAxis(c.axis, rank)
	if err != nil {
		return nil, fmt.Errorf("Concat: %v", err)
	}
	shape := append([]int(nil), in[0].Shape...)
	shape[axis] = 0
	for i, t := range in {
		if t == nil || len(t.Shape) != rank || (t.DType == tensor.Float32) != (in[0].DType == tensor.Float32) {
			return nil, fmt.Errorf("Concat: input %d (%v) does not match input 0 (%s)", i, t, in[0])
		}
		for d := range shape {
			if d != axis && t.Shape[d] != shape[d] {
				return nil, fmt.Errorf("Concat: input %d shape %v does not match %v off axis %d", i, t.Shape, in[0].Shape, axis)
			}
		}
		shape[axis] += t.Shape[axis]
	}
	out := shNewLike(in[0], shape)
	outer := tensor.Numel(shape[:axis])
	inner := tensor.Numel(shape[axis+1:])
	rowOut := shape[axis] * inner
	off := 0
	for _, t := range in {
		blk := t.Shape[axis] * inner
		for o := 0; o < outer; o++ {
			shCopyBlock(out, o*rowOut+off, t, o*blk, blk)
		}
		off += blk
	}
	return []*tensor.Tensor{out}, nil
}

func (c *concatOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, len(in))
	g := gradOut[0]
	if g == nil || g.DType != tensor.Float32 {
		return grads, nil
	}
	axis, err := shAxis(c.axis, len(g.Shape))
	if err != nil {
		return nil, err
	}
	outer := tensor.Numel(g.Shape[:axis])
	inner := tensor.Numel(g.Shape[axis+1:])
	rowOut := g.Shape[axis] * inner
	off := 0
	for i, t := range in {
		blk := t.Shape[axis] * inner
		gi := tensor.New(t.Shape...)
		for o := 0; o < outer; o++ {
			copy(gi.F32[o*blk:(o+1)*blk], g.F32[o*rowOut+off:])
		}
		grads[i] = gi
		off += blk
	}
	return grads, nil
}

func (c *concatOp) BackwardNeeds() (in, out []int) { return nil, nil }

// ---------------------------------------------------------------------------
// Split

// splitOp cuts the input along axis into len(outputs) pieces. Sizes come
// from the split attribute (opset < 13), the optional split input (13+),
// num_outputs (18+, last piece smaller) or else equal parts.
type splitOp struct {
	axis     int64
	nOut     int
	attr     []int64 // split attribute, opset < 13
	useInput bool
	numOut   int64 // opset 18 num_outputs, 0 if absent
}

func buildSplit(n *onnx.Node, env *Env) (Op, error) {
	s := &splitOp{axis: n.Int("axis", 0), nOut: len(n.Outputs)}
	if env.Opset < 13 {
		s.attr = n.Ints("split")
	} else {
		s.useInput = true
	}
	if env.Opset >= 18 && n.Has("num_outputs") {
		s.numOut = n.Int("num_outputs", 0)
		if s.numOut != int64(s.nOut) {
			return nil, fmt.Errorf("Split: num_outputs=%d but node has %d outputs", s.numOut, s.nOut)
		}
	}
	return s, nil
}

func (s *splitOp) sizes(in []*tensor.Tensor, dim int) ([]int, error) {
	split := s.attr
	if s.useInput {
		var err error
		if split, err = shInts(shOptional(in, 1), "Split: split"); err != nil {
			return nil, err
		}
	}
	sizes := make([]int, s.nOut)
	switch {
	case len(split) > 0:
		if len(split) != s.nOut {
			return nil, fmt.Errorf("Split: %d split sizes for %d outputs", len(split), s.nOut)
		}
		sum := 0
		for i, v := range split {
			if v < 0 {
				return nil, fmt.Errorf("Split: negative split size %d", v)
			}
			sizes[i] = int(v)
			sum += int(v)
		}
		if sum != dim {
			return nil, fmt.Errorf("Split: split sizes %v do not sum to dimension %d", split, dim)
		}
	case s.numOut > 0:
		chunk := (dim + s.nOut - 1) / s.nOut
		left := dim
		for i := range sizes {
			sizes[i] = min(chunk, left)
			left -= sizes[i]
		}
	default:
		if s.nOut == 0 || dim%s.nOut != 0 {
			return nil, fmt.Errorf("Split: dimension %d does not split evenly into %d outputs", dim, s.nOut)
		}
		for i := range sizes {
			sizes[i] = dim / s.nOut
		}
	}
	return sizes, nil
}

func (s *splitOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "Split"); err != nil {
		return nil, err
	}
	x := in[0]
	axis, err := shAxis(s.axis, len(x.Shape))
	if err != nil {
		return nil, fmt.Errorf("Split: %v", err)
	}
	sizes, err := s.sizes(in, x.Shape[axis])
	if err != nil {
		return nil, err
	}
	outer := tensor.Numel(x.Shape[:axis])
	inner := tensor.Numel(x.Shape[axis+1:])
	row := x.Shape[axis] * inner
	outs := make([]*tensor.Tensor, len(sizes))
	off := 0
	for i, sz := range sizes {
		shape := append([]int(nil), x.Shape...)
		shape[axis] = sz
		y := shNewLike(x, shape)
		blk := sz * inner
		for o := 0; o < outer; o++ {
			shCopyBlock(y, o*blk, x, o*row+off, blk)
		}
		outs[i] = y
		off += blk
	}
	return outs, nil
}

func (s *splitOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, len(in))
	x := in[0]
	if x.DType != tensor.Float32 {
		return grads, nil
	}
	axis, err := shAxis(s.axis, len(x.Shape))
	if err != nil {
		return nil, err
	}
	outer := tensor.Numel(x.Shape[:axis])
	inner := tensor.Numel(x.Shape[axis+1:])
	row := x.Shape[axis] * inner
	gx := tensor.New(x.Shape...)
	off, any := 0, false
	for i, y := range out {
		blk := y.Shape[axis] * inner
		if g := gradOut[i]; g != nil {
			any = true
			for o := 0; o < outer; o++ {
				copy(gx.F32[o*row+off:o*row+off+blk], g.F32[o*blk:])
			}
		}
		off += blk
	}
	if any {
		grads[0] = gx
	}
	return grads, nil
}

func (s *splitOp) BackwardNeeds() (in, out []int) { return nil, nil }

// ---------------------------------------------------------------------------
// Slice

// sliceOp takes starts/ends/axes/steps from attributes (opset < 10) or
// inputs 1–4 (opset 10+). Negative indices count from the end; indices are
// clamped as the ONNX specification prescribes, with steps < 0 walking
// backwards.
type sliceOp struct {
	attrs                    bool
	starts, ends, axes, step []int64
}

func buildSlice(n *onnx.Node, env *Env) (Op, error) {
	if env.Opset < 10 {
		s := &sliceOp{attrs: true, starts: n.Ints("starts"), ends: n.Ints("ends"), axes: n.Ints("axes")}
		if len(s.starts) != len(s.ends) {
			return nil, fmt.Errorf("Slice: starts and ends differ in length")
		}
		return s, nil
	}
	return &sliceOp{}, nil
}

// plan returns the output shape and per-axis source index lists.
func (s *sliceOp) plan(in []*tensor.Tensor) ([]int, [][]int, error) {
	x := in[0]
	starts, ends, axes, steps := s.starts, s.ends, s.axes, s.step
	if !s.attrs {
		var err error
		if err = shNeed(in, 3, "Slice"); err != nil {
			return nil, nil, err
		}
		if starts, err = shInts(in[1], "Slice: starts"); err != nil {
			return nil, nil, err
		}
		if ends, err = shInts(in[2], "Slice: ends"); err != nil {
			return nil, nil, err
		}
		if axes, err = shInts(shOptional(in, 3), "Slice: axes"); err != nil {
			return nil, nil, err
		}
		if steps, err = shInts(shOptional(in, 4), "Slice: steps"); err != nil {
			return nil, nil, err
		}
	}
	rank := len(x.Shape)
	if len(starts) != len(ends) || (axes != nil && len(axes) != len(starts)) || (steps != nil && len(steps) != len(starts)) {
		return nil, nil, fmt.Errorf("Slice: starts, ends, axes and steps differ in length")
	}
	lists := make([][]int, rank)
	shape := append([]int(nil), x.Shape...)
	seen := make([]bool, rank)
	for i := range starts {
		ax := int64(i)
		if axes != nil {
			ax = axes[i]
		}
		a, err := shAxis(ax, rank)
		if err != nil {
			return nil, nil, fmt.Errorf("Slice: %v", err)
		}
		if seen[a] {
			return nil, nil, fmt.Errorf("Slice: axis %d repeated", a)
		}
		seen[a] = true
		step := int64(1)
		if steps != nil {
			step = steps[i]
		}
		if step == 0 {
			return nil, nil, fmt.Errorf("Slice: step 0 on axis %d", a)
		}
		dim := int64(x.Shape[a])
		st, en := starts[i], ends[i]
		if st < 0 {
			st += dim
		}
		if en < 0 {
			en += dim
		}
		var list []int
		if step > 0 {
			st, en = clampI64(st, 0, dim), clampI64(en, 0, dim)
			for j := st; j < en; j += step {
				list = append(list, int(j))
			}
		} else {
			st, en = clampI64(st, 0, dim-1), clampI64(en, -1, dim-1)
			for j := st; j > en; j += step {
				list = append(list, int(j))
			}
		}
		lists[a] = list
		shape[a] = len(list)
	}
	for a := range lists {
		if lists[a] == nil && !seen[a] {
			lists[a] = make([]int, x.Shape[a])
			for j := range lists[a] {
				lists[a][j] = j
			}
		}
	}
	return shape, lists, nil
}

func clampI64(v, lo, hi int64) int64 {
	return max(lo, min(hi, v))
}

func (s *sliceOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "Slice"); err != nil {
		return nil, err
	}
	_, lists, err := s.plan(in)
	if err != nil {
		return nil, err
	}
	return []*tensor.Tensor{newShAxisPlan(in[0].Shape, lists).gather(in[0], 0, 0)}, nil
}

func (s *sliceOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads, g := floatBackward(in, gradOut)
	if g == nil {
		return grads, nil
	}
	_, lists, err := s.plan(in)
	if err != nil {
		return nil, err
	}
	grads[0] = newShAxisPlan(in[0].Shape, lists).scatterAdd(g.F32, in[0].Shape)
	return grads, nil
}

// BackwardNeeds: only the index inputs; x contributes its shape.
func (s *sliceOp) BackwardNeeds() (in, out []int) { return []int{1, 2, 3, 4}, nil }

// ---------------------------------------------------------------------------
// Gather

type gatherOp struct{ axis int64 }

func buildGather(n *onnx.Node, env *Env) (Op, error) {
	return &gatherOp{axis: n.Int("axis", 0)}, nil
}

// plan validates indices and returns axis, normalised indices and the
// output shape.
func (g *gatherOp) plan(x, ind *tensor.Tensor) (int, []int, []int, error) {
	axis, err := shAxis(g.axis, len(x.Shape))
	if err != nil {
		return 0, nil, nil, fmt.Errorf("Gather: %v", err)
	}
	raw, err := shInts(ind, "Gather: indices")
	if err != nil {
		return 0, nil, nil, err
	}
	dim := int64(x.Shape[axis])
	idx := make([]int, len(raw))
	for i, v := range raw {
		if v < -dim || v >= dim {
			return 0, nil, nil, fmt.Errorf("Gather: index %d out of range for dimension %d", v, dim)
		}
		if v < 0 {
			v += dim
		}
		idx[i] = int(v)
	}
	shape := append(append(append([]int(nil), x.Shape[:axis]...), ind.Shape...), x.Shape[axis+1:]...)
	return axis, idx, shape, nil
}

func (g *gatherOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 2, "Gather"); err != nil {
		return nil, err
	}
	x := in[0]
	axis, idx, shape, err := g.plan(x, in[1])
	if err != nil {
		return nil, err
	}
	y := shNewLike(x, shape)
	outer := tensor.Numel(x.Shape[:axis])
	inner := tensor.Numel(x.Shape[axis+1:])
	row := x.Shape[axis] * inner
	o := 0
	for b := 0; b < outer; b++ {
		for _, j := range idx {
			shCopyBlock(y, o, x, b*row+j*inner, inner)
			o += inner
		}
	}
	return []*tensor.Tensor{y}, nil
}

// Backward scatters-adds: repeated indices accumulate.
func (g *gatherOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, 2)
	gy := gradOut[0]
	x := in[0]
	if gy == nil || x.DType != tensor.Float32 {
		return grads, nil
	}
	axis, idx, _, err := g.plan(x, in[1])
	if err != nil {
		return nil, err
	}
	gx := tensor.New(x.Shape...)
	outer := tensor.Numel(x.Shape[:axis])
	inner := tensor.Numel(x.Shape[axis+1:])
	row := x.Shape[axis] * inner
	o := 0
	for b := 0; b < outer; b++ {
		for _, j := range idx {
			dst := gx.F32[b*row+j*inner : b*row+(j+1)*inner]
			for k, v := range gy.F32[o : o+inner] {
				dst[k] += v
			}
			o += inner
		}
	}
	grads[0] = gx
	return grads, nil
}

func (g *gatherOp) BackwardNeeds() (in, out []int) { return []int{1}, nil }

// ---------------------------------------------------------------------------
// Transpose

type transposeOp struct{ perm []int64 }

func buildTranspose(n *onnx.Node, env *Env) (Op, error) {
	return &transposeOp{perm: n.Ints("perm")}, nil
}

func (t *transposeOp) permFor(rank int) ([]int, error) {
	perm := make([]int, rank)
	if t.perm == nil {
		for i := range perm {
			perm[i] = rank - 1 - i
		}
		return perm, nil
	}
	if len(t.perm) != rank {
		return nil, fmt.Errorf("Transpose: perm %v for rank %d", t.perm, rank)
	}
	seen := make([]bool, rank)
	for i, p := range t.perm {
		a, err := shAxis(p, rank)
		if err != nil || seen[a] {
			return nil, fmt.Errorf("Transpose: perm %v is not a permutation", t.perm)
		}
		seen[a] = true
		perm[i] = a
	}
	return perm, nil
}

// shTransposePlan is the gather plan of a transpose: output axis i walks
// source axis perm[i] with that axis's stride.
func shTransposePlan(src []int, perm []int) *shAxisPlan {
	st := shStrides(src)
	p := &shAxisPlan{shape: make([]int, len(perm)), offs: make([][]int, len(perm))}
	for i, a := range perm {
		p.shape[i] = src[a]
		p.offs[i] = make([]int, src[a])
		for j := range p.offs[i] {
			p.offs[i][j] = j * st[a]
		}
	}
	return p
}

func (t *transposeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "Transpose"); err != nil {
		return nil, err
	}
	perm, err := t.permFor(len(in[0].Shape))
	if err != nil {
		return nil, err
	}
	return []*tensor.Tensor{shTransposePlan(in[0].Shape, perm).gather(in[0], 0, 0)}, nil
}

func (t *transposeOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	g := gradOut[0]
	if g == nil || in[0].DType != tensor.Float32 {
		return []*tensor.Tensor{nil}, nil
	}
	perm, err := t.permFor(len(in[0].Shape))
	if err != nil {
		return nil, err
	}
	return []*tensor.Tensor{shTransposePlan(in[0].Shape, perm).scatterAdd(g.F32, in[0].Shape)}, nil
}

func (t *transposeOp) BackwardNeeds() (in, out []int) { return nil, nil }

// ---------------------------------------------------------------------------
// Squeeze, Unsqueeze: pure views (the output shares the input's storage).

type squeezeOp struct {
	unsqueeze bool
	fromInput bool
	axes      []int64
}

func buildSqueeze(n *onnx.Node, env *Env) (Op, error) {
	return &squeezeOp{fromInput: env.Opset >= 13, axes: n.Ints("axes")}, nil
}

func buildUnsqueeze(n *onnx.Node, env *Env) (Op, error) {
	if env.Opset < 13 && !n.Has("axes") {
		return nil, fmt.Errorf("Unsqueeze: missing attribute axes")
	}
	return &squeezeOp{unsqueeze: true, fromInput: env.Opset >= 13, axes: n.Ints("axes")}, nil
}

func (s *squeezeOp) name() string {
	if s.unsqueeze {
		return "Unsqueeze"
	}
	return "Squeeze"
}

func (s *squeezeOp) outShape(in []*tensor.Tensor) ([]int, error) {
	x := in[0]
	axes := s.axes
	if s.fromInput {
		var err error
		if axes, err = shInts(shOptional(in, 1), s.name()+": axes"); err != nil {
			return nil, err
		}
	}
	if s.unsqueeze {
		rank := len(x.Shape) + len(axes)
		if len(axes) == 0 {
			return nil, fmt.Errorf("Unsqueeze: no axes")
		}
		inserted := make([]bool, rank)
		for _, a := range axes {
			ax, err := shAxis(a, rank)
			if err != nil || inserted[ax] {
				return nil, fmt.Errorf("Unsqueeze: bad or repeated axis %d for output rank %d", a, rank)
			}
			inserted[ax] = true
		}
		shape := make([]int, 0, rank)
		j := 0
		for d := 0; d < rank; d++ {
			if inserted[d] {
				shape = append(shape, 1)
			} else {
				shape = append(shape, x.Shape[j])
				j++
			}
		}
		return shape, nil
	}
	drop := make([]bool, len(x.Shape))
	if len(axes) == 0 {
		for d, v := range x.Shape {
			drop[d] = v == 1
		}
	}
	for _, a := range axes {
		ax, err := shAxis(a, len(x.Shape))
		if err != nil {
			return nil, fmt.Errorf("Squeeze: %v", err)
		}
		if x.Shape[ax] != 1 {
			return nil, fmt.Errorf("Squeeze: axis %d has size %d, not 1", a, x.Shape[ax])
		}
		drop[ax] = true
	}
	shape := []int{}
	for d, v := range x.Shape {
		if !drop[d] {
			shape = append(shape, v)
		}
	}
	return shape, nil
}

func (s *squeezeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, s.name()); err != nil {
		return nil, err
	}
	shape, err := s.outShape(in)
	if err != nil {
		return nil, err
	}
	x := in[0]
	return []*tensor.Tensor{{DType: x.DType, Shape: shape, F32: x.F32, I64: x.I64}}, nil
}

func (s *squeezeOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, len(in))
	if g := gradOut[0]; g != nil && g.DType == tensor.Float32 {
		grads[0] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), in[0].Shape...), F32: append([]float32(nil), g.F32...)}
	}
	return grads, nil
}

func (s *squeezeOp) BackwardNeeds() (in, out []int) { return nil, nil }

// ---------------------------------------------------------------------------
// Pad

type padMode uint8

const (
	padConstant padMode = iota
	padReflect
	padEdge
	padWrap
)

// padOp pads (or, with negative pads, crops) each axis. Pads and the
// constant come from attributes before opset 11 and from inputs after;
// opset 18 adds an optional axes input.
type padOp struct {
	mode  padMode
	attrs bool
	pads  []int64
	value float32
}

func buildPad(n *onnx.Node, env *Env) (Op, error) {
	p := &padOp{}
	switch m := n.String("mode", "constant"); m {
	case "constant":
		p.mode = padConstant
	case "reflect":
		p.mode = padReflect
	case "edge":
		p.mode = padEdge
	case "wrap":
		p.mode = padWrap
	default:
		return nil, fmt.Errorf("Pad: unknown mode %q", m)
	}
	if env.Opset < 11 {
		p.attrs = true
		p.pads = n.Ints("pads")
		if p.pads == nil {
			p.pads = n.Ints("paddings") // opset 1 name
		}
		p.value = n.Float("value", 0)
	}
	return p, nil
}

// plan returns the output shape, per-axis source lists and the fill value.
func (p *padOp) plan(in []*tensor.Tensor) ([]int, [][]int, float32, int64, error) {
	x := in[0]
	rank := len(x.Shape)
	pads, value, valueI := p.pads, p.value, int64(p.value)
	if !p.attrs {
		var err error
		if err = shNeed(in, 2, "Pad"); err != nil {
			return nil, nil, 0, 0, err
		}
		if pads, err = shInts(in[1], "Pad: pads"); err != nil {
			return nil, nil, 0, 0, err
		}
		if c := shOptional(in, 2); c != nil && c.Len() > 0 {
			if c.DType == tensor.Float32 {
				value, valueI = c.F32[0], int64(c.F32[0])
			} else {
				value, valueI = float32(c.I64[0]), c.I64[0]
			}
		}
		if a := shOptional(in, 3); a != nil {
			axes, err := shInts(a, "Pad: axes")
			if err != nil {
				return nil, nil, 0, 0, err
			}
			if len(pads) != 2*len(axes) {
				return nil, nil, 0, 0, fmt.Errorf("Pad: %d pads for %d axes", len(pads), len(axes))
			}
			full := make([]int64, 2*rank)
			for i, av := range axes {
				ax, err := shAxis(av, rank)
				if err != nil {
					return nil, nil, 0, 0, fmt.Errorf("Pad: %v", err)
				}
				full[ax], full[rank+ax] = pads[i], pads[len(axes)+i]
			}
			pads = full
		}
	}
	if len(pads) != 2*rank {
		return nil, nil, 0, 0, fmt.Errorf("Pad: %d pads for rank %d", len(pads), rank)
	}
	shape := make([]int, rank)
	lists := make([][]int, rank)
	for d := 0; d < rank; d++ {
		n := x.Shape[d]
		b, e := int(pads[d]), int(pads[rank+d])
		size := n + b + e
		if size < 0 {
			return nil, nil, 0, 0, fmt.Errorf("Pad: pads %v crop axis %d below zero", pads, d)
		}
		if p.mode != padConstant && n == 0 && size > 0 {
			return nil, nil, 0, 0, fmt.Errorf("Pad: cannot pad an empty axis in this mode")
		}
		if p.mode == padReflect && n == 1 && (b > 0 || e > 0) {
			return nil, nil, 0, 0, fmt.Errorf("Pad: reflect needs at least 2 elements on axis %d", d)
		}
		shape[d] = size
		list := make([]int, size)
		for i := range list {
			j := i - b
			if j < 0 || j >= n {
				switch p.mode {
				case padConstant:
					j = -1
				case padEdge:
					j = max(0, min(n-1, j))
				case padWrap:
					j = ((j % n) + n) % n
				case padReflect:
					period := 2 * (n - 1)
					j = ((j % period) + period) % period
					if j >= n {
						j = period - j
					}
				}
			}
			list[i] = j
		}
		lists[d] = list
	}
	return shape, lists, value, valueI, nil
}

func (p *padOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "Pad"); err != nil {
		return nil, err
	}
	_, lists, v, vi, err := p.plan(in)
	if err != nil {
		return nil, err
	}
	return []*tensor.Tensor{newShAxisPlan(in[0].Shape, lists).gather(in[0], v, vi)}, nil
}

// Backward scatters the gradient back: for edge and reflect several output
// positions read one input element, and their gradients add.
func (p *padOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads, g := floatBackward(in, gradOut)
	if g == nil {
		return grads, nil
	}
	_, lists, _, _, err := p.plan(in)
	if err != nil {
		return nil, err
	}
	plan := newShAxisPlan(in[0].Shape, lists)
	grads[0] = plan.scatterAdd(g.F32, in[0].Shape)
	if c := shOptional(in, 2); c != nil && c.DType == tensor.Float32 && !p.attrs {
		// The constant value fills every padded position.
		var s float64
		if p.mode == padConstant {
			plan.rows(func(o, base int, last []int) {
				for i, lo := range last {
					if base < 0 || lo < 0 {
						s += float64(g.F32[o+i])
					}
				}
			})
		}
		gc := tensor.New(c.Shape...)
		if len(gc.F32) > 0 {
			gc.F32[0] = float32(s)
		}
		grads[2] = gc
	}
	return grads, nil
}

func (p *padOp) BackwardNeeds() (in, out []int) { return []int{1, 2, 3}, nil }

// ---------------------------------------------------------------------------
// Expand

type expandOp struct{}

func buildExpand(n *onnx.Node, env *Env) (Op, error) { return expandOp{}, nil }

func (expandOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 2, "Expand"); err != nil {
		return nil, err
	}
	x := in[0]
	want, err := shDims(in[1], "Expand: shape")
	if err != nil {
		return nil, err
	}
	shape, err := broadcastShapes(x.Shape, want)
	if err != nil {
		return nil, fmt.Errorf("Expand: %v", err)
	}
	if x.DType == tensor.Float32 {
		d, err := expandF32(x.F32, x.Shape, shape)
		if err != nil {
			return nil, err
		}
		return []*tensor.Tensor{{DType: x.DType, Shape: shape, F32: d}}, nil
	}
	d, err := expandI64(x.I64, x.Shape, shape)
	if err != nil {
		return nil, err
	}
	return []*tensor.Tensor{{DType: x.DType, Shape: shape, I64: d}}, nil
}

func (expandOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, 2)
	g := gradOut[0]
	if g == nil || in[0].DType != tensor.Float32 {
		return grads, nil
	}
	r, err := reduceToShape(g.F32, g.Shape, in[0].Shape)
	if err != nil {
		return nil, err
	}
	grads[0] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), in[0].Shape...), F32: ownCopy(r, g.F32)}
	return grads, nil
}

func (expandOp) BackwardNeeds() (in, out []int) { return nil, nil }

// ---------------------------------------------------------------------------
// Shape, ConstantOfShape

// shapeOp returns the input's dims [start:end] (opset 15 slicing; negative
// values count from the end and both are clamped).
type shapeOp struct{ start, end int64 }

func buildShape(n *onnx.Node, env *Env) (Op, error) {
	return &shapeOp{start: n.Int("start", 0), end: n.Int("end", math.MaxInt64)}, nil
}

func (s *shapeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "Shape"); err != nil {
		return nil, err
	}
	rank := int64(len(in[0].Shape))
	st, en := s.start, s.end
	if st < 0 {
		st += rank
	}
	if en < 0 {
		en += rank
	}
	st, en = clampI64(st, 0, rank), clampI64(en, 0, rank)
	var dims []int64
	for i := st; i < en; i++ {
		dims = append(dims, int64(in[0].Shape[i]))
	}
	if dims == nil {
		dims = []int64{}
	}
	return []*tensor.Tensor{tensor.FromInt64(dims, len(dims))}, nil
}

// constantOfShapeOp fills a tensor of the requested shape with the value
// attribute (a one-element tensor, default float 0).
type constantOfShapeOp struct{ value *tensor.Tensor }

func buildConstantOfShape(n *onnx.Node, env *Env) (Op, error) {
	v := tensor.FromFloat32([]float32{0}, 1)
	if a, ok := n.Attrs["value"]; ok {
		if a.Tensor == nil || a.Tensor.Len() != 1 {
			return nil, fmt.Errorf("ConstantOfShape: attribute value must be a one-element tensor")
		}
		v = a.Tensor
	}
	return &constantOfShapeOp{value: v}, nil
}

func (c *constantOfShapeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "ConstantOfShape"); err != nil {
		return nil, err
	}
	shape, err := shDims(in[0], "ConstantOfShape: shape")
	if err != nil {
		return nil, err
	}
	y := shNewLike(c.value, shape)
	if y.DType == tensor.Float32 {
		for i := range y.F32 {
			y.F32[i] = c.value.F32[0]
		}
	} else {
		for i := range y.I64 {
			y.I64[i] = c.value.I64[0]
		}
	}
	return []*tensor.Tensor{y}, nil
}
