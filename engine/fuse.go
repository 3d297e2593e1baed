package engine

import (
	"heedmap/tensor"
)

// Activation fusion. A Conv whose only reader is the next node, a Relu or
// a Clip with constant bounds, is run as one operator: the activation is
// applied to the convolution's output in place, while the block is still
// warm in cache, and the activation node passes that tensor on. This saves
// a full read and write of the activation and one buffer per layer.
//
// Fusion is decided per Run: a pair is fused only when the convolution's
// output is not retained (not a graph output, not in RunOptions.Keep and
// not read by Backward). Relu's and Clip's backward read their input, so
// Backward runs never fuse and compute exactly as before; forward-only
// runs, the bulk of occlusion and RISE, do. The fused result is bit
// identical to the separate operators (the same float32 expressions).
//
// The pre-activation value is then never observable: its only reader is
// the activation node, and Run frees it after that node.

// fusionPlan lists, per node index, the fused operator to run instead of
// the node (for the Conv head) and whether the node is a fused tail.
type fusionPlan struct {
	head map[int]*fusedConvAct
	tail map[int]int // tail node → head node
}

// fusedConvAct runs conv and then the activation in place on its output.
type fusedConvAct struct {
	conv   *convOp
	relu   bool
	lo, hi float32 // Clip bounds
}

func (f *fusedConvAct) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if f.relu {
		return f.conv.forward(in, actRelu, 0, 0)
	}
	return f.conv.forward(in, actClip, f.lo, f.hi)
}

// passOp returns its first input: the fused tail's output is the head's
// already-activated tensor.
type passOp struct{}

func (passOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return []*tensor.Tensor{in[0]}, nil
}

// planFusion finds the Conv→Relu and Conv→Clip pairs that may be fused.
func planFusion(g *Graph) *fusionPlan {
	readers := make([]int, len(g.names))
	for _, nd := range g.nodes {
		for _, v := range nd.in {
			if v >= 0 {
				readers[v]++
			}
		}
	}
	fp := &fusionPlan{head: map[int]*fusedConvAct{}, tail: map[int]int{}}
	for k := 0; k+1 < len(g.nodes); k++ {
		conv, ok := g.nodes[k].op.(*convOp)
		next := g.nodes[k+1]
		if !ok || len(g.nodes[k].out) != 1 || len(next.in) == 0 || len(next.out) != 1 {
			continue
		}
		z := g.nodes[k].out[0]
		if z < 0 || next.in[0] != z || readers[z] != 1 || g.isOutput[z] {
			continue
		}
		f := &fusedConvAct{conv: conv}
		switch op := next.op.(type) {
		case *unaryOp:
			if op.name != "Relu" {
				continue
			}
			f.relu = true
		case *clipOp:
			bin := []*tensor.Tensor{nil}
			constant := true
			for _, v := range next.in[1:] {
				if v < 0 {
					bin = append(bin, nil)
					continue
				}
				if g.consts[v] == nil {
					constant = false
					break
				}
				bin = append(bin, g.consts[v])
			}
			if !constant {
				continue
			}
			lo, hi, err := op.bounds(bin)
			if err != nil {
				continue
			}
			f.lo, f.hi = float32(lo), float32(hi)
		default:
			continue
		}
		fp.head[k] = f
		fp.tail[k+1] = k
	}
	return fp
}

// fusedOp returns the operator Run executes for node k: the fused pair's
// operator, passOp for its tail, or the node's own operator when the pair
// is not fused in this run (the pre-activation value must be retained).
func (g *Graph) fusedOp(k int, keep []bool) Op {
	fp := g.fusion
	if fp == nil {
		return g.nodes[k].op
	}
	if f, ok := fp.head[k]; ok && !keep[g.nodes[k].out[0]] {
		return f
	}
	if h, ok := fp.tail[k]; ok && !keep[g.nodes[h].out[0]] {
		return passOp{}
	}
	return g.nodes[k].op
}
