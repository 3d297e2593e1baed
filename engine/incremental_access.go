package engine

import "heedmap/kernel"

// This file is the only place the incremental evaluator reads operator
// internals, so a change to an operator's fields breaks one small file.

// convGEMM returns the matrix-product kernel a compiled Conv was built
// with, so the incremental path multiplies with the same kernel as Run.
func convGEMM(op Op) (kernel.GEMM, bool) {
	c, ok := op.(*convOp)
	if !ok || c.gemm == nil {
		return nil, false
	}
	return c.gemm, true
}

// panelConv returns a compiled Conv that has the packed-panel path (a
// single-threaded packed GEMM), nil otherwise, so the incremental path can
// lower its batches of window patches side by side as Run does
// (convOp.batchForward).
func panelConv(op Op) *convOp {
	if c, ok := op.(*convOp); ok && c.gemm1 != nil {
		return c
	}
	return nil
}

// convActivation reports the activation Run fuses into the Conv of node k
// (fuse.go): a Relu, or a Clip with its constant bounds, that is node
// k+1 and the Conv output's only reader.
func convActivation(g *Graph, k int) (act actKind, lo, hi float32, ok bool) {
	if g.fusion == nil {
		return actNone, 0, 0, false
	}
	f, ok := g.fusion.head[k]
	switch {
	case !ok:
		return actNone, 0, 0, false
	case f.relu:
		return actRelu, 0, 0, true
	}
	return actClip, f.lo, f.hi, true
}
