package engine

import (
	"fmt"

	"heedmap/tensor"
)

// Epilogue fusion. A Conv whose only reader is the next node is run
// together with that node and, in one case, the node after it:
//
//   - Conv→Relu and Conv→Clip (constant bounds): the activation is applied
//     to the convolution's output block while it is still warm in cache.
//   - Conv→Add, optionally →Relu/Clip: a residual connection (He et al.,
//     "Deep Residual Learning for Image Recognition", 2016; the inverted
//     residuals of MobileNetV2 add without an activation). The other Add
//     operand, computed earlier, is added in the same pass over the block
//     (kernel.BiasAddClamp), so the sum is never written and read back
//     and the residual is read once, in cache-sized pieces.
//
// The fused value is bit identical to the separate operators (the same
// float32 operations in the same order; addition commutes, so Add's
// operand order does not matter). Each saves at least a full read and
// write of an activation and one buffer per layer.
//
// Fusion is decided per Run: a chain is fused only when none of its
// intermediate values (the convolution's output, and the sum when an
// activation follows the Add) is retained: not a graph output, not in
// RunOptions.Keep and not read by Backward. Relu's and Clip's backward
// read only their output and Add's reads neither operand, so backward
// runs fuse too; the intermediate values are then never observable: their
// only reader is the next node of the chain, and Run frees them after it.
// When the residual's shape differs from the convolution's output (Add
// broadcasting), the chain runs its operators one after another.

// fusionPlan lists, per node index, the fused operator to run instead of
// the node (for the Conv head) and, for the other nodes of a chain, the
// head and which input they pass on.
type fusionPlan struct {
	head  map[int]*fusedConvAct // Conv→activation pairs
	resid map[int]*fusedConvAct // Conv→Add(→activation) chains
	tail  map[int]fusedTail
	// pwdwByPW: pointwise Convs whose product the depthwise Conv that
	// reads it computes (fuse_pwdw.go), by pointwise node.
	pwdwByPW map[int]*pwdwPair
	// dwpwByDW: depthwise Convs computed with the pointwise Conv that
	// reads them (fuse_dwpw.go), by depthwise node.
	dwpwByDW map[int]*dwpwPair
}

// fusedTail is a node folded into the chain headed by node head: it
// outputs its input arg unchanged (the head's result).
type fusedTail struct {
	head, arg int
}

// fusedConvAct runs conv with the rest of its chain in the epilogue. In
// the residual form Forward receives the Conv node's inputs padded to
// three (X, W, B or nil) followed by the residual operand (Run appends
// it).
type fusedConvAct struct {
	conv   *convOp
	act    actKind
	relu   bool    // act is actRelu
	lo, hi float32 // Clip bounds
	// res is the value index of the Add's other operand, −1 without an
	// Add; add and resFirst give the unfused fallback (res is Add's
	// input 0 when resFirst) and actOp the activation's operator, nil
	// when none follows.
	res      int
	add      Op
	resFirst bool
	actOp    Op
	// inner lists the values computed inside the chain and passed on
	// only within it; the chain is fused in a run only if none is kept.
	inner []int
}

func (f *fusedConvAct) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if f.res < 0 {
		return f.conv.forwardEp(in, nil, f.act, f.lo, f.hi)
	}
	if len(in) != 4 {
		return nil, fmt.Errorf("fused Conv→Add: %d inputs, want X, W, B and the residual", len(in))
	}
	conv, r := in[:3], in[3]
	if r == nil || r.DType != tensor.Float32 || in[0] == nil || in[1] == nil || !shapeEq(r.Shape, f.conv.outShape(in[0], in[1])) {
		return f.unfused(conv, r)
	}
	return f.conv.forwardEp(conv, r.F32, f.act, f.lo, f.hi)
}

// unfused runs the chain's operators one after another, for a residual
// the fused epilogue cannot take (one Add would broadcast).
func (f *fusedConvAct) unfused(conv []*tensor.Tensor, r *tensor.Tensor) ([]*tensor.Tensor, error) {
	z, err := f.conv.forwardEp(conv, nil, actNone, 0, 0)
	if err != nil {
		return nil, err
	}
	pair := []*tensor.Tensor{z[0], r}
	if f.resFirst {
		pair[0], pair[1] = r, z[0]
	}
	out, err := f.add.Forward(pair)
	if err != nil || f.actOp == nil {
		return out, err
	}
	return f.actOp.Forward(out[:1])
}

// passOp returns its input arg: a fused tail's output is the head's
// result.
type passOp struct{ arg int }

func (p passOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return []*tensor.Tensor{in[p.arg]}, nil
}

// planFusion finds the chains that may be fused: a Conv followed by a
// Relu or constant-bound Clip, or by an Add (whose other operand is
// computed before the Conv runs, as any input of the next node is) and
// optionally then a Relu or Clip.
func planFusion(g *Graph) *fusionPlan {
	markConstWeights(g)
	readers := make([]int, len(g.names))
	for _, nd := range g.nodes {
		for _, v := range nd.in {
			if v >= 0 {
				readers[v]++
			}
		}
	}
	// single reports whether node k has one output, read only by node
	// k+1 as its input i (−1: any input), and not a graph output.
	single := func(k, i int) (arg int, ok bool) {
		if k+1 >= len(g.nodes) || len(g.nodes[k].out) != 1 || len(g.nodes[k+1].out) != 1 {
			return 0, false
		}
		z := g.nodes[k].out[0]
		if z < 0 || readers[z] != 1 || g.isOutput[z] {
			return 0, false
		}
		for a, v := range g.nodes[k+1].in {
			if v == z && (i < 0 || a == i) {
				return a, true
			}
		}
		return 0, false
	}
	fp := &fusionPlan{head: map[int]*fusedConvAct{}, resid: map[int]*fusedConvAct{}, tail: map[int]fusedTail{}}
	for k := 0; k+1 < len(g.nodes); k++ {
		conv, ok := g.nodes[k].op.(*convOp)
		if !ok {
			continue
		}
		f := &fusedConvAct{conv: conv, res: -1}
		if _, ok := single(k, 0); ok && g.fuseActivation(k+1, f) {
			f.inner = []int{g.nodes[k].out[0]}
			fp.head[k] = f
			fp.tail[k+1] = fusedTail{head: k}
			continue
		}
		arg, ok := single(k, -1)
		add, isBin := g.nodes[k+1].op.(*binaryOp)
		if !ok || !isBin || add.kind != binAdd || add.legacy || len(g.nodes[k+1].in) != 2 {
			continue
		}
		r := g.nodes[k+1].in[1-arg]
		if r < 0 || r == g.nodes[k].out[0] {
			continue
		}
		f.res, f.add, f.resFirst = r, add, arg == 1
		f.inner = []int{g.nodes[k].out[0]}
		fp.resid[k] = f
		fp.tail[k+1] = fusedTail{head: k, arg: arg}
		if _, ok := single(k+1, 0); ok && g.fuseActivation(k+2, f) {
			f.actOp = g.nodes[k+2].op
			f.inner = append(f.inner, g.nodes[k+1].out[0])
			fp.tail[k+2] = fusedTail{head: k}
		}
	}
	fp.pwdwByPW = planPointwiseDepthwise(g, fp)
	fp.dwpwByDW = planDepthwisePointwise(g, fp)
	return fp
}

// fuseActivation reports whether node k is a Relu or a Clip with constant
// bounds and, if so, sets f's activation to it.
func (g *Graph) fuseActivation(k int, f *fusedConvAct) bool {
	if k >= len(g.nodes) {
		return false
	}
	next := g.nodes[k]
	switch op := next.op.(type) {
	case *unaryOp:
		if op.name != "Relu" {
			return false
		}
		f.act, f.relu = actRelu, true
		return true
	case *clipOp:
		bin := []*tensor.Tensor{nil}
		for _, v := range next.in[1:] {
			if v < 0 {
				bin = append(bin, nil)
				continue
			}
			if g.consts[v] == nil {
				return false
			}
			bin = append(bin, g.consts[v])
		}
		lo, hi, err := op.bounds(bin)
		if err != nil {
			return false
		}
		f.act, f.lo, f.hi = actClip, float32(lo), float32(hi)
		return true
	}
	return false
}

// fused reports whether the chain headed by node h is fused in a run that
// keeps the values keep marks.
func (fp *fusionPlan) fused(h int, keep []bool) bool {
	f, ok := fp.head[h]
	if !ok {
		f = fp.resid[h]
	}
	for _, v := range f.inner {
		if keep[v] {
			return false
		}
	}
	return true
}

// fusedOp returns the operator Run executes for node k: the fused chain's
// operator, passOp for its tail, or the node's own operator when the
// chain is not fused in this run (an intermediate value must be retained).
func (g *Graph) fusedOp(k int, keep []bool) Op {
	fp := g.fusion
	if fp == nil {
		return g.nodes[k].op
	}
	if f, ok := fp.head[k]; ok && fp.fused(k, keep) {
		return f
	}
	if f, ok := fp.resid[k]; ok && fp.fused(k, keep) {
		return f
	}
	if t, ok := fp.tail[k]; ok && fp.fused(t.head, keep) {
		return passOp{arg: t.arg}
	}
	return g.nodes[k].op
}

// fusedInputs appends to in, the Conv node's inputs, what a fused residual
// chain's head also reads: in padded to X, W, B, then the residual.
func fusedInputs(op Op, in []*tensor.Tensor, vals []*tensor.Tensor) []*tensor.Tensor {
	f, ok := op.(*fusedConvAct)
	if !ok || f.res < 0 {
		return in
	}
	for len(in) < 3 {
		in = append(in, nil)
	}
	return append(in, vals[f.res])
}

// markConstWeights tells each convolution whether its weights are a
// graph constant (planFusion runs once per compiled Graph, after constant
// folding), which the row-panel path needs to keep them packed.
func markConstWeights(g *Graph) {
	for _, nd := range g.nodes {
		if c, ok := nd.op.(*convOp); ok {
			c.constW = len(nd.in) > 1 && nd.in[1] >= 0 && g.consts[nd.in[1]] != nil
		}
	}
}
