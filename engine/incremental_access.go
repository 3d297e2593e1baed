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

// convGEMM1 returns the single-threaded packed GEMM a compiled Conv keeps
// for its panel paths (nil when it has none), so the incremental path can
// lower patches straight into packed panels as Run does.
func convGEMM1(op Op) *kernel.Packed {
	if c, ok := op.(*convOp); ok {
		return c.gemm1
	}
	return nil
}

// convTeam returns the helper team a compiled Conv runs its parallel
// phases on (nil when it has none), so the incremental path's patch
// products use the same warm helpers as Run.
func convTeam(op Op) *team {
	if c, ok := op.(*convOp); ok {
		return c.team
	}
	return nil
}
