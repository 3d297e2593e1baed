package engine

// More data-movement operators: Tile, Range, Size, CastLike,
// GatherElements, DepthToSpace, SpaceToDepth, Trilu, CumSum, NonZero.

import (
	"fmt"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("Tile", buildTile)
	register("Range", buildRange)
	register("Size", buildSize)
	register("CastLike", buildCastLike)
	register("GatherElements", buildGatherElements)
	register("DepthToSpace", buildDepthToSpace(true))
	register("SpaceToDepth", buildDepthToSpace(false))
	register("Trilu", buildTrilu)
	register("CumSum", buildCumSum)
	register("NonZero", buildNonZero)
}

// takeOp is an op whose output is x at a computed offset list; forward
// gathers and backward scatter-adds with the same list.
type takeOp struct {
	name  string
	plan  func(in []*tensor.Tensor) (shape []int, idx []int, err error)
	needs []int // inputs Backward reads (besides x's shape)
}

func (o *takeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, o.name); err != nil {
		return nil, err
	}
	shape, idx, err := o.plan(in)
	if err != nil {
		return nil, err
	}
	return []*tensor.Tensor{shTake(in[0], shape, idx, 0, 0)}, nil
}

func (o *takeOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return takeBackward(in, gradOut, o.plan)
}

// takeBackward is the backward of any op whose first output gathers x at
// the offsets plan computes: the gradient scatter-adds back through the
// same offsets; other inputs get none.
func takeBackward(in, gradOut []*tensor.Tensor, plan func([]*tensor.Tensor) ([]int, []int, error)) ([]*tensor.Tensor, error) {
	grads, g := floatBackward(in, gradOut)
	if g == nil {
		return grads, nil
	}
	_, idx, err := plan(in)
	if err != nil {
		return nil, err
	}
	grads[0] = shScatterAdd(g.F32, idx, in[0].Shape)
	return grads, nil
}

func (o *takeOp) BackwardNeeds() (in, out []int) { return o.needs, nil }

// ---------------------------------------------------------------------------

func buildTile(n *onnx.Node, env *Env) (Op, error) {
	return &takeOp{name: "Tile", needs: []int{1}, plan: func(in []*tensor.Tensor) ([]int, []int, error) {
		if err := shNeed(in, 2, "Tile"); err != nil {
			return nil, nil, err
		}
		reps, err := shInts(in[1], "Tile: repeats")
		if err != nil {
			return nil, nil, err
		}
		x := in[0]
		if len(reps) != len(x.Shape) {
			return nil, nil, fmt.Errorf("Tile: %d repeats for rank %d", len(reps), len(x.Shape))
		}
		shape := make([]int, len(reps))
		lists := make([][]int, len(reps))
		for d, r := range reps {
			if r < 0 {
				return nil, nil, fmt.Errorf("Tile: negative repeat %d", r)
			}
			shape[d] = x.Shape[d] * int(r)
			lists[d] = make([]int, shape[d])
			for j := range lists[d] {
				lists[d][j] = j % x.Shape[d]
			}
		}
		return shape, shAxisTake(x.Shape, lists), nil
	}}, nil
}

// DepthToSpace (DCR or CRD mode) and SpaceToDepth are fixed permutations of
// an NCHW tensor.
func buildDepthToSpace(toSpace bool) Builder {
	return func(n *onnx.Node, env *Env) (Op, error) {
		name := "SpaceToDepth"
		if toSpace {
			name = "DepthToSpace"
		}
		b := int(n.Int("blocksize", 0))
		if b <= 0 {
			return nil, fmt.Errorf("%s: blocksize must be positive", name)
		}
		crd := n.String("mode", "DCR") == "CRD"
		return &takeOp{name: name, plan: func(in []*tensor.Tensor) ([]int, []int, error) {
			x := in[0]
			if len(x.Shape) != 4 {
				return nil, nil, fmt.Errorf("%s: needs a 4-D input, got %s", name, x)
			}
			N, C, H, W := x.Shape[0], x.Shape[1], x.Shape[2], x.Shape[3]
			if toSpace {
				if C%(b*b) != 0 {
					return nil, nil, fmt.Errorf("%s: %d channels not divisible by blocksize² %d", name, C, b*b)
				}
				c := C / (b * b)
				shape := []int{N, c, H * b, W * b}
				idx := make([]int, 0, x.Len())
				for nn := 0; nn < N; nn++ {
					for cc := 0; cc < c; cc++ {
						for h := 0; h < H*b; h++ {
							for w := 0; w < W*b; w++ {
								bh, bw := h%b, w%b
								src := (bh*b+bw)*c + cc // DCR: depth, then column, then row
								if crd {
									src = cc*b*b + bh*b + bw
								}
								idx = append(idx, ((nn*C+src)*H+h/b)*W+w/b)
							}
						}
					}
				}
				return shape, idx, nil
			}
			if H%b != 0 || W%b != 0 {
				return nil, nil, fmt.Errorf("%s: spatial size %dx%d not divisible by blocksize %d", name, H, W, b)
			}
			shape := []int{N, C * b * b, H / b, W / b}
			idx := make([]int, 0, x.Len())
			for nn := 0; nn < N; nn++ {
				for oc := 0; oc < C*b*b; oc++ {
					blk, cc := oc/C, oc%C
					bh, bw := blk/b, blk%b
					for h := 0; h < H/b; h++ {
						for w := 0; w < W/b; w++ {
							idx = append(idx, ((nn*C+cc)*H+h*b+bh)*W+w*b+bw)
						}
					}
				}
			}
			return shape, idx, nil
		}}, nil
	}
}

// Trilu keeps the upper (upper=1) or lower triangle of the last two axes,
// offset by diagonal k (optional input 1).
func buildTrilu(n *onnx.Node, env *Env) (Op, error) {
	upper := n.Int("upper", 1) != 0
	return &takeOp{name: "Trilu", needs: []int{1}, plan: func(in []*tensor.Tensor) ([]int, []int, error) {
		x := in[0]
		if len(x.Shape) < 2 {
			return nil, nil, fmt.Errorf("Trilu: needs rank ≥ 2, got %s", x)
		}
		k := int64(0)
		if t := shOptional(in, 1); t != nil {
			v, err := shInts(t, "Trilu: k")
			if err != nil {
				return nil, nil, err
			}
			if len(v) != 1 {
				return nil, nil, fmt.Errorf("Trilu: k must be a scalar")
			}
			k = v[0]
		}
		r, c := x.Shape[len(x.Shape)-2], x.Shape[len(x.Shape)-1]
		idx := make([]int, x.Len())
		for i := range idx {
			row, col := int64((i/c)%r), int64(i%c)
			keep := col-row >= k
			if !upper {
				keep = col-row <= k
			}
			if keep {
				idx[i] = i
			} else {
				idx[i] = -1
			}
		}
		return x.Shape, idx, nil
	}}, nil
}

// GatherElements picks x along axis at the per-element indices.
func buildGatherElements(n *onnx.Node, env *Env) (Op, error) {
	axisAttr := n.Int("axis", 0)
	return &takeOp{name: "GatherElements", needs: []int{1}, plan: func(in []*tensor.Tensor) ([]int, []int, error) {
		if err := shNeed(in, 2, "GatherElements"); err != nil {
			return nil, nil, err
		}
		x, ind := in[0], in[1]
		raw, err := shInts(ind, "GatherElements: indices")
		if err != nil {
			return nil, nil, err
		}
		axis, err := shAxis(axisAttr, len(x.Shape))
		if err != nil || len(ind.Shape) != len(x.Shape) {
			return nil, nil, fmt.Errorf("GatherElements: indices %s do not match data %s on axis %d", ind, x, axisAttr)
		}
		xs, is := shStrides(x.Shape), shStrides(ind.Shape)
		dim := int64(x.Shape[axis])
		idx := make([]int, len(raw))
		for i, v := range raw {
			if v < -dim || v >= dim {
				return nil, nil, fmt.Errorf("GatherElements: index %d out of range for dimension %d", v, dim)
			}
			if v < 0 {
				v += dim
			}
			off, rem := 0, i
			for d := range ind.Shape {
				c := rem / is[d]
				rem %= is[d]
				if d == axis {
					c = int(v)
				} else if c >= x.Shape[d] {
					return nil, nil, fmt.Errorf("GatherElements: indices shape %v exceeds data shape %v", ind.Shape, x.Shape)
				}
				off += c * xs[d]
			}
			idx[i] = off
		}
		return ind.Shape, idx, nil
	}}, nil
}

// ---------------------------------------------------------------------------
// CumSum

type cumSumOp struct{ exclusive, reverse bool }

func buildCumSum(n *onnx.Node, env *Env) (Op, error) {
	return &cumSumOp{exclusive: n.Int("exclusive", 0) != 0, reverse: n.Int("reverse", 0) != 0}, nil
}

func (c *cumSumOp) geometry(in []*tensor.Tensor) (outer, dim, inner int, err error) {
	if err = shNeed(in, 2, "CumSum"); err != nil {
		return
	}
	a, err := shInts(in[1], "CumSum: axis")
	if err != nil {
		return
	}
	if len(a) != 1 {
		err = fmt.Errorf("CumSum: axis must be a scalar")
		return
	}
	x := in[0]
	ax, err := shAxis(a[0], len(x.Shape))
	if err != nil {
		err = fmt.Errorf("CumSum: %v", err)
		return
	}
	return tensor.Numel(x.Shape[:ax]), x.Shape[ax], tensor.Numel(x.Shape[ax+1:]), nil
}

// scan runs the cumulative sum along the axis; reverse flips direction.
func scanF32(src, dst []float32, outer, dim, inner int, exclusive, reverse bool) {
	for o := 0; o < outer; o++ {
		for i := 0; i < inner; i++ {
			var acc float32
			for s := 0; s < dim; s++ {
				j := s
				if reverse {
					j = dim - 1 - s
				}
				p := (o*dim+j)*inner + i
				if exclusive {
					dst[p] = acc
					acc += src[p]
				} else {
					acc += src[p]
					dst[p] = acc
				}
			}
		}
	}
}

func (c *cumSumOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	outer, dim, inner, err := c.geometry(in)
	if err != nil {
		return nil, err
	}
	x := in[0]
	if x.DType == tensor.Float32 {
		y := tensor.New(x.Shape...)
		scanF32(x.F32, y.F32, outer, dim, inner, c.exclusive, c.reverse)
		return []*tensor.Tensor{y}, nil
	}
	y := &tensor.Tensor{DType: x.DType, Shape: append([]int(nil), x.Shape...), I64: make([]int64, x.Len())}
	for o := 0; o < outer; o++ {
		for i := 0; i < inner; i++ {
			var acc int64
			for s := 0; s < dim; s++ {
				j := s
				if c.reverse {
					j = dim - 1 - s
				}
				p := (o*dim+j)*inner + i
				if c.exclusive {
					y.I64[p] = acc
					acc += x.I64[p]
				} else {
					acc += x.I64[p]
					y.I64[p] = acc
				}
			}
		}
	}
	return []*tensor.Tensor{y}, nil
}

// Backward: the adjoint of a cumulative sum is the cumulative sum in the
// opposite direction (same exclusivity).
func (c *cumSumOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads, g := floatBackward(in, gradOut)
	if g == nil {
		return grads, nil
	}
	outer, dim, inner, err := c.geometry(in)
	if err != nil {
		return nil, err
	}
	gx := tensor.New(in[0].Shape...)
	scanF32(g.F32, gx.F32, outer, dim, inner, c.exclusive, !c.reverse)
	grads[0] = gx
	return grads, nil
}

func (c *cumSumOp) BackwardNeeds() (in, out []int) { return []int{1}, nil }

// ---------------------------------------------------------------------------
// Range, Size, CastLike, NonZero

type rangeOp struct{}

func buildRange(n *onnx.Node, env *Env) (Op, error) { return rangeOp{}, nil }

// Forward: ceil((limit-start)/delta) elements start, start+delta, ...
func (rangeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 3, "Range"); err != nil {
		return nil, err
	}
	for i, t := range in[:3] {
		if t.Len() != 1 {
			return nil, fmt.Errorf("Range: input %d must be a scalar, got %s", i, t)
		}
	}
	if in[0].DType == tensor.Float32 {
		s, l, d := float64(in[0].F32[0]), float64(in[1].F32[0]), float64(in[2].F32[0])
		if d == 0 {
			return nil, fmt.Errorf("Range: delta is 0")
		}
		n := int(max(0, ceilDiv(l-s, d)))
		if n > 1<<28 {
			return nil, fmt.Errorf("Range: %d elements is too many", n)
		}
		y := tensor.New(n)
		for i := range y.F32 {
			y.F32[i] = float32(s + float64(i)*d)
		}
		return []*tensor.Tensor{y}, nil
	}
	s, l, d := in[0].I64[0], in[1].I64[0], in[2].I64[0]
	if d == 0 {
		return nil, fmt.Errorf("Range: delta is 0")
	}
	n := int(max(0, ceilDiv(float64(l-s), float64(d))))
	if n > 1<<28 {
		return nil, fmt.Errorf("Range: %d elements is too many", n)
	}
	y := tensor.NewInt64(n)
	for i := range y.I64 {
		y.I64[i] = s + int64(i)*d
	}
	return []*tensor.Tensor{y}, nil
}

func ceilDiv(a, b float64) float64 {
	q := a / b
	if f := float64(int64(q)); f < q {
		return f + 1
	}
	return float64(int64(q))
}

type sizeOp struct{}

func buildSize(n *onnx.Node, env *Env) (Op, error) { return sizeOp{}, nil }

func (sizeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "Size"); err != nil {
		return nil, err
	}
	return []*tensor.Tensor{tensor.FromInt64([]int64{int64(in[0].Len())})}, nil
}

// castLikeOp casts input 0 to the element type of input 1.
type castLikeOp struct{}

func buildCastLike(n *onnx.Node, env *Env) (Op, error) { return castLikeOp{}, nil }

func (castLikeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 2, "CastLike"); err != nil {
		return nil, err
	}
	return (&castOp{to: in[1].DType}).Forward(in[:1])
}

func (castLikeOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	g, err := (&castOp{to: in[1].DType}).Backward(in[:1], out, gradOut)
	if err != nil {
		return nil, err
	}
	return append(g, nil), nil
}

func (castLikeOp) BackwardNeeds() (in, out []int) { return nil, nil }

type nonZeroOp struct{}

func buildNonZero(n *onnx.Node, env *Env) (Op, error) { return nonZeroOp{}, nil }

// Forward returns a [rank, count] int64 tensor of the non-zero coordinates
// in row-major order.
func (nonZeroOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "NonZero"); err != nil {
		return nil, err
	}
	x := in[0]
	var hits []int
	for i := 0; i < x.Len(); i++ {
		if x.DType == tensor.Float32 && x.F32[i] != 0 || x.DType != tensor.Float32 && x.I64[i] != 0 {
			hits = append(hits, i)
		}
	}
	rank := len(x.Shape)
	st := shStrides(x.Shape)
	y := tensor.NewInt64(rank, len(hits))
	for j, h := range hits {
		for d := 0; d < rank; d++ {
			y.I64[d*len(hits)+j] = int64(h / st[d] % x.Shape[d])
		}
	}
	return []*tensor.Tensor{y}, nil
}
