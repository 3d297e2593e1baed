package engine

// Index-driven operators: TopK, Compress, GatherND, ScatterElements (and
// the older Scatter), ScatterND, OneHot, EyeLike, and the Shrink
// activation. Gathers back-propagate by scatter-adding; scatters without a
// reduction route the gradient of overwritten data positions to the updates.

import (
	"fmt"
	"sort"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("TopK", buildTopK)
	register("Compress", buildCompress)
	register("GatherND", buildGatherND)
	register("ScatterElements", buildScatterElements)
	register("Scatter", buildScatterElements)
	register("ScatterND", buildScatterND)
	register("OneHot", buildOneHot)
	register("EyeLike", buildEyeLike)
	register("Shrink", buildShrink)
}

// ---------------------------------------------------------------------------
// TopK

type topKOp struct {
	axis            int64
	largest, sorted bool
	attrK           int64 // opset 1: k attribute
}

func buildTopK(n *onnx.Node, env *Env) (Op, error) {
	op := &topKOp{axis: n.Int("axis", -1), largest: n.Int("largest", 1) != 0, sorted: n.Int("sorted", 1) != 0, attrK: -1}
	if env.Opset < 10 {
		op.attrK = n.Int("k", -1)
		if op.attrK < 0 {
			return nil, fmt.Errorf("TopK: missing attribute k")
		}
	}
	return op, nil
}

// plan returns the output shape and, per output element, the flat source
// offset of the selected element.
func (op *topKOp) plan(in []*tensor.Tensor) ([]int, []int, error) {
	if err := shNeed(in, 1, "TopK"); err != nil {
		return nil, nil, err
	}
	x := in[0]
	k := op.attrK
	if k < 0 {
		if err := shNeed(in, 2, "TopK"); err != nil {
			return nil, nil, err
		}
		kv, err := shInts(in[1], "TopK: K")
		if err != nil {
			return nil, nil, err
		}
		if len(kv) != 1 {
			return nil, nil, fmt.Errorf("TopK: K must have one element")
		}
		k = kv[0]
	}
	axis, err := shAxis(op.axis, len(x.Shape))
	if err != nil {
		return nil, nil, fmt.Errorf("TopK: %v", err)
	}
	outer, dim, inner := tensor.Numel(x.Shape[:axis]), x.Shape[axis], tensor.Numel(x.Shape[axis+1:])
	if k < 0 || k > int64(dim) {
		return nil, nil, fmt.Errorf("TopK: K=%d outside [0, %d]", k, dim)
	}
	kk := int(k)
	shape := append([]int(nil), x.Shape...)
	shape[axis] = kk
	val := func(i int) float64 {
		if x.DType == tensor.Float32 {
			return float64(x.F32[i])
		}
		return float64(x.I64[i])
	}
	idx := make([]int, outer*kk*inner)
	order := make([]int, dim)
	for o := 0; o < outer; o++ {
		for i := 0; i < inner; i++ {
			for j := range order {
				order[j] = j
			}
			at := func(j int) float64 { return val((o*dim+j)*inner + i) }
			// Ties keep the lower index first, as the operator specifies.
			sort.SliceStable(order, func(a, b int) bool {
				va, vb := at(order[a]), at(order[b])
				if op.largest {
					return va > vb
				}
				return va < vb
			})
			for r := 0; r < kk; r++ {
				idx[(o*kk+r)*inner+i] = (o*dim+order[r])*inner + i
			}
		}
	}
	return shape, idx, nil
}

func (op *topKOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	shape, idx, err := op.plan(in)
	if err != nil {
		return nil, err
	}
	x := in[0]
	axis, _ := shAxis(op.axis, len(x.Shape))
	inner := tensor.Numel(x.Shape[axis+1:])
	dim := x.Shape[axis]
	indices := tensor.NewInt64(shape...)
	for p, src := range idx {
		indices.I64[p] = int64((src / inner) % dim)
	}
	return []*tensor.Tensor{shTake(x, shape, idx, 0, 0), indices}, nil
}

func (op *topKOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return takeBackward(in, gradOut, op.plan)
}

// ---------------------------------------------------------------------------
// Compress

func buildCompress(n *onnx.Node, env *Env) (Op, error) {
	hasAxis := n.Has("axis")
	axisAttr := n.Int("axis", 0)
	return &takeOp{name: "Compress", needs: []int{1}, plan: func(in []*tensor.Tensor) ([]int, []int, error) {
		if err := shNeed(in, 2, "Compress"); err != nil {
			return nil, nil, err
		}
		x := in[0]
		cond, err := shInts(in[1], "Compress: condition")
		if err != nil {
			return nil, nil, err
		}
		if !hasAxis {
			var idx []int
			for i, c := range cond {
				if c != 0 && i < x.Len() {
					idx = append(idx, i)
				}
			}
			return []int{len(idx)}, idx, nil
		}
		axis, err := shAxis(axisAttr, len(x.Shape))
		if err != nil {
			return nil, nil, fmt.Errorf("Compress: %v", err)
		}
		lists := make([][]int, len(x.Shape))
		for d := range lists {
			for j := 0; j < x.Shape[d]; j++ {
				if d != axis || (j < len(cond) && cond[j] != 0) {
					lists[d] = append(lists[d], j)
				}
			}
		}
		shape := make([]int, len(lists))
		for d := range lists {
			shape[d] = len(lists[d])
		}
		return shape, shAxisTake(x.Shape, lists), nil
	}}, nil
}

// ---------------------------------------------------------------------------
// GatherND

func buildGatherND(n *onnx.Node, env *Env) (Op, error) {
	batch := int(n.Int("batch_dims", 0))
	return &takeOp{name: "GatherND", needs: []int{1}, plan: func(in []*tensor.Tensor) ([]int, []int, error) {
		if err := shNeed(in, 2, "GatherND"); err != nil {
			return nil, nil, err
		}
		x, ind := in[0], in[1]
		raw, err := shInts(ind, "GatherND: indices")
		if err != nil {
			return nil, nil, err
		}
		q, r := len(ind.Shape), len(x.Shape)
		if q < 1 || batch < 0 || batch >= q || batch >= r {
			return nil, nil, fmt.Errorf("GatherND: bad batch_dims %d for data %s and indices %s", batch, x, ind)
		}
		m := ind.Shape[q-1]
		if batch+m > r {
			return nil, nil, fmt.Errorf("GatherND: index tuples of length %d too long for data %s", m, x)
		}
		for d := 0; d < batch; d++ {
			if ind.Shape[d] != x.Shape[d] {
				return nil, nil, fmt.Errorf("GatherND: batch dimension %d differs", d)
			}
		}
		shape := append(append([]int(nil), ind.Shape[:q-1]...), x.Shape[batch+m:]...)
		slice := tensor.Numel(x.Shape[batch+m:])
		st := shStrides(x.Shape)
		nb := tensor.Numel(ind.Shape[:batch])
		per := tensor.Numel(ind.Shape[batch : q-1])
		batchStride := 1
		if batch > 0 {
			batchStride = st[batch-1]
		}
		idx := make([]int, 0, tensor.Numel(shape))
		for b := 0; b < nb; b++ {
			for t := 0; t < per; t++ {
				tuple := raw[(b*per+t)*m : (b*per+t+1)*m]
				off := b * batchStride
				if batch == 0 {
					off = 0
				}
				for j, v := range tuple {
					dim := int64(x.Shape[batch+j])
					if v < -dim || v >= dim {
						return nil, nil, fmt.Errorf("GatherND: index %d out of range for dimension %d", v, dim)
					}
					if v < 0 {
						v += dim
					}
					off += int(v) * st[batch+j]
				}
				for s := 0; s < slice; s++ {
					idx = append(idx, off+s)
				}
			}
		}
		return shape, idx, nil
	}}, nil
}

// ---------------------------------------------------------------------------
// ScatterElements / Scatter and ScatterND

type scatterOp struct {
	name      string
	nd        bool
	axis      int64
	reduction string
}

func buildScatterElements(n *onnx.Node, env *Env) (Op, error) {
	return newScatter(n, false)
}

func buildScatterND(n *onnx.Node, env *Env) (Op, error) { return newScatter(n, true) }

func newScatter(n *onnx.Node, nd bool) (Op, error) {
	s := &scatterOp{name: n.OpType, nd: nd, axis: n.Int("axis", 0), reduction: n.String("reduction", "none")}
	switch s.reduction {
	case "none", "add", "mul", "max", "min":
	default:
		return nil, fmt.Errorf("%s: unknown reduction %q", s.name, s.reduction)
	}
	return s, nil
}

// targets returns, for each update element, the flat data offset it hits.
func (s *scatterOp) targets(in []*tensor.Tensor) ([]int, error) {
	if err := shNeed(in, 3, s.name); err != nil {
		return nil, err
	}
	x, ind, upd := in[0], in[1], in[2]
	raw, err := shInts(ind, s.name+": indices")
	if err != nil {
		return nil, err
	}
	st := shStrides(x.Shape)
	if s.nd {
		q := len(ind.Shape)
		if q < 1 {
			return nil, fmt.Errorf("%s: scalar indices", s.name)
		}
		m := ind.Shape[q-1]
		if m > len(x.Shape) {
			return nil, fmt.Errorf("%s: index tuples of length %d for data %s", s.name, m, x)
		}
		slice := tensor.Numel(x.Shape[m:])
		n := tensor.Numel(ind.Shape[:q-1])
		if upd.Len() != n*slice {
			return nil, fmt.Errorf("%s: updates %s do not match indices %s and data %s", s.name, upd, ind, x)
		}
		t := make([]int, 0, upd.Len())
		for i := 0; i < n; i++ {
			off := 0
			for j, v := range raw[i*m : (i+1)*m] {
				dim := int64(x.Shape[j])
				if v < -dim || v >= dim {
					return nil, fmt.Errorf("%s: index %d out of range for dimension %d", s.name, v, dim)
				}
				if v < 0 {
					v += dim
				}
				off += int(v) * st[j]
			}
			for k := 0; k < slice; k++ {
				t = append(t, off+k)
			}
		}
		return t, nil
	}
	axis, err := shAxis(s.axis, len(x.Shape))
	if err != nil {
		return nil, fmt.Errorf("%s: %v", s.name, err)
	}
	if !shapeEq(ind.Shape, upd.Shape) || len(ind.Shape) != len(x.Shape) {
		return nil, fmt.Errorf("%s: indices %s, updates %s and data %s disagree", s.name, ind, upd, x)
	}
	is := shStrides(ind.Shape)
	dim := int64(x.Shape[axis])
	t := make([]int, len(raw))
	for i, v := range raw {
		if v < -dim || v >= dim {
			return nil, fmt.Errorf("%s: index %d out of range for dimension %d", s.name, v, dim)
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
				return nil, fmt.Errorf("%s: indices shape %v exceeds data shape %v", s.name, ind.Shape, x.Shape)
			}
			off += c * st[d]
		}
		t[i] = off
	}
	return t, nil
}

func (s *scatterOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	t, err := s.targets(in)
	if err != nil {
		return nil, err
	}
	x, upd := in[0], in[2]
	if (x.DType == tensor.Float32) != (upd.DType == tensor.Float32) {
		return nil, fmt.Errorf("%s: data %s and updates %s differ in type", s.name, x, upd)
	}
	y := x.Clone()
	if x.DType == tensor.Float32 {
		scatterReduce(y.F32, upd.F32, t, s.reduction)
	} else {
		scatterReduce(y.I64, upd.I64, t, s.reduction)
	}
	return []*tensor.Tensor{y}, nil
}

// scatterReduce combines update i into y[t[i]] by the reduction ("none"
// overwrites). The built-in max and min return NaN when either operand is
// NaN and order −0 below +0, as math.Max and math.Min do.
func scatterReduce[T float32 | int64](y, upd []T, t []int, reduction string) {
	for i, p := range t {
		u := upd[i]
		switch reduction {
		case "add":
			y[p] += u
		case "mul":
			y[p] *= u
		case "max":
			y[p] = max(y[p], u)
		case "min":
			y[p] = min(y[p], u)
		default:
			y[p] = u
		}
	}
}

// Backward for reduction none and add. With none, a data position that an
// update overwrote gets no gradient, and each update receives the output
// gradient at its target (with duplicate targets only the last write
// survives, so only it gets the gradient).
func (s *scatterOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads, g := floatBackward(in, gradOut)
	if g == nil {
		return grads, nil
	}
	if s.reduction != "none" && s.reduction != "add" {
		return nil, fmt.Errorf("%s: backward with reduction %q is not implemented", s.name, s.reduction)
	}
	t, err := s.targets(in)
	if err != nil {
		return nil, err
	}
	gx := g.Clone()
	gu := tensor.New(in[2].Shape...)
	last := map[int]int{}
	for i, p := range t {
		last[p] = i
	}
	for i, p := range t {
		if s.reduction == "add" || last[p] == i {
			gu.F32[i] = g.F32[p]
		}
		if s.reduction == "none" {
			gx.F32[p] = 0
		}
	}
	grads[0], grads[2] = gx, gu
	return grads, nil
}

func (s *scatterOp) BackwardNeeds() (in, out []int) { return []int{1}, nil }

// ---------------------------------------------------------------------------
// OneHot, EyeLike

type oneHotOp struct{ axis int64 }

func buildOneHot(n *onnx.Node, env *Env) (Op, error) { return &oneHotOp{axis: n.Int("axis", -1)}, nil }

func (o *oneHotOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 3, "OneHot"); err != nil {
		return nil, err
	}
	ind, depthT, values := in[0], in[1], in[2]
	if depthT.Len() != 1 || values.Len() != 2 {
		return nil, fmt.Errorf("OneHot: depth must be a scalar and values have two elements")
	}
	depth := 0
	if depthT.DType == tensor.Float32 {
		depth = int(depthT.F32[0])
	} else {
		depth = int(depthT.I64[0])
	}
	if depth <= 0 {
		return nil, fmt.Errorf("OneHot: depth %d", depth)
	}
	rank := len(ind.Shape) + 1
	axis, err := shAxis(o.axis, rank)
	if err != nil {
		return nil, fmt.Errorf("OneHot: %v", err)
	}
	shape := append(append(append([]int(nil), ind.Shape[:axis]...), depth), ind.Shape[axis:]...)
	y := shNewLike(values, shape)
	outer, inner := tensor.Numel(ind.Shape[:axis]), tensor.Numel(ind.Shape[axis:])
	for p := 0; p < y.Len(); p++ {
		if values.DType == tensor.Float32 {
			y.F32[p] = values.F32[0]
		} else {
			y.I64[p] = values.I64[0]
		}
	}
	for o := 0; o < outer; o++ {
		for i := 0; i < inner; i++ {
			var v int
			if ind.DType == tensor.Float32 {
				v = int(ind.F32[o*inner+i])
			} else {
				v = int(ind.I64[o*inner+i])
			}
			if v < 0 {
				v += depth
			}
			if v < 0 || v >= depth {
				continue // out-of-range indices give an all-off row
			}
			p := (o*depth+v)*inner + i
			if values.DType == tensor.Float32 {
				y.F32[p] = values.F32[1]
			} else {
				y.I64[p] = values.I64[1]
			}
		}
	}
	return []*tensor.Tensor{y}, nil
}

type eyeLikeOp struct {
	k     int64
	dtype int64
}

func buildEyeLike(n *onnx.Node, env *Env) (Op, error) {
	return &eyeLikeOp{k: n.Int("k", 0), dtype: n.Int("dtype", 0)}, nil
}

func (e *eyeLikeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "EyeLike"); err != nil {
		return nil, err
	}
	x := in[0]
	if len(x.Shape) != 2 {
		return nil, fmt.Errorf("EyeLike: needs a 2-D input, got %s", x)
	}
	dt := x.DType
	if e.dtype != 0 {
		c, err := buildCast(&onnx.Node{Attrs: map[string]*onnx.Attr{"to": {Name: "to", Type: onnx.AttrInt, Int: e.dtype}}}, &Env{Opset: 13})
		if err != nil {
			return nil, fmt.Errorf("EyeLike: %v", err)
		}
		dt = c.(*castOp).to
	}
	y := shNewLike(&tensor.Tensor{DType: dt}, x.Shape)
	r, c := x.Shape[0], x.Shape[1]
	for i := 0; i < r; i++ {
		j := i + int(e.k)
		if j < 0 || j >= c {
			continue
		}
		if dt == tensor.Float32 {
			y.F32[i*c+j] = 1
		} else {
			y.I64[i*c+j] = 1
		}
	}
	return []*tensor.Tensor{y}, nil
}

// ---------------------------------------------------------------------------
// Shrink

func buildShrink(n *onnx.Node, env *Env) (Op, error) {
	bias, lambd := n.Float("bias", 0), n.Float("lambd", 0.5)
	return &unaryOp{name: "Shrink",
		f: func(x float32) float32 {
			switch {
			case x < -lambd:
				return x + bias
			case x > lambd:
				return x - bias
			}
			return 0
		},
		df: func(x, _ float32) float32 {
			if x < -lambd || x > lambd {
				return 1
			}
			return 0
		},
		i64: func(x int64) int64 {
			l, b := float64(lambd), int64(bias)
			switch {
			case float64(x) < -l:
				return x + b
			case float64(x) > l:
				return x - b
			}
			return 0
		},
		useIn: true}, nil
}
