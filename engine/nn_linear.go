package engine

import (
	"fmt"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("Gemm", buildGemm)
	register("MatMul", buildMatMul)
}

// gemmOp is ONNX Gemm: Y = alpha·op(A)·op(B) + beta·C, C broadcast
// unidirectionally to [M, N]. The output is always a fresh tensor, so the
// bias initializer is only ever read.
type gemmOp struct {
	transA, transB bool
	alpha, beta    float32
	gemm           kernel.GEMM
}

func buildGemm(n *onnx.Node, env *Env) (Op, error) {
	if len(n.Inputs) < 2 {
		return nil, fmt.Errorf("Gemm needs A and B, got %d inputs", len(n.Inputs))
	}
	return &gemmOp{
		transA: n.Int("transA", 0) != 0,
		transB: n.Int("transB", 0) != 0,
		alpha:  n.Float("alpha", 1),
		beta:   n.Float("beta", 1),
		gemm:   onTeam(env.GEMM, env.team),
	}, nil
}

func (op *gemmOp) dims(a, b []int) (m, n, k int, err error) {
	if len(a) != 2 || len(b) != 2 {
		return 0, 0, 0, fmt.Errorf("A %v and B %v must be 2-D", a, b)
	}
	m, k = a[0], a[1]
	if op.transA {
		m, k = k, m
	}
	kb, n := b[0], b[1]
	if op.transB {
		kb, n = n, kb
	}
	if k != kb {
		return 0, 0, 0, fmt.Errorf("A %v (transA=%v) and B %v (transB=%v) do not multiply", a, op.transA, b, op.transB)
	}
	return m, n, k, nil
}

// biasIndex maps C's shape, broadcast to [m, n], to strides (0 on a
// broadcast axis).
func gemmBiasStrides(c []int, m, n int) (rs, cs int, err error) {
	switch len(c) {
	case 0:
		return 0, 0, nil
	case 1:
		if c[0] == n {
			return 0, 1, nil
		}
		if c[0] == 1 {
			return 0, 0, nil
		}
	case 2:
		rs, cs = n, 1
		if c[1] == 1 {
			rs, cs = 1, 0
		} else if c[1] != n {
			break
		}
		if c[0] == 1 {
			rs = 0
		} else if c[0] != m {
			break
		}
		return rs, cs, nil
	}
	return 0, 0, fmt.Errorf("C %v does not broadcast to [%d %d]", c, m, n)
}

func (op *gemmOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	a, b := in[0], in[1]
	if err := wantFloat(a, "A", 2); err != nil {
		return nil, err
	}
	if err := wantFloat(b, "B", 2); err != nil {
		return nil, err
	}
	m, n, k, err := op.dims(a.Shape, b.Shape)
	if err != nil {
		return nil, err
	}
	y := tensor.New(m, n)
	beta := float32(0)
	if len(in) > 2 && in[2] != nil && op.beta != 0 {
		c := in[2]
		if err := wantFloat(c, "C", 0); err != nil {
			return nil, err
		}
		rs, cs, err := gemmBiasStrides(c.Shape, m, n)
		if err != nil {
			return nil, err
		}
		for i := 0; i < m; i++ {
			for j := 0; j < n; j++ {
				y.F32[i*n+j] = c.F32[i*rs+j*cs]
			}
		}
		beta = op.beta
	}
	op.gemm.Sgemm(op.transA, op.transB, m, n, k, op.alpha, a.F32, a.Shape[1], b.F32, b.Shape[1], beta, y.F32, n)
	return []*tensor.Tensor{y}, nil
}

func (op *gemmOp) BackwardNeeds() (in, out []int) { return []int{0, 1}, nil }

// BackwardNeedsFor implements SelectiveBackward: dA reads B, dB reads A.
func (op *gemmOp) BackwardNeedsFor(need []bool) (in, out []int) { return crossNeeds(need), nil }

// crossNeeds is the need set of a product: each operand's gradient reads
// the other operand.
func crossNeeds(need []bool) []int {
	var in []int
	if need[0] {
		in = append(in, 1)
	}
	if need[1] {
		in = append(in, 0)
	}
	return in
}

func (op *gemmOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return op.BackwardFor(in, out, gradOut, []bool{true, true, true})
}

// BackwardFor: with G = dY, dop(A) = α·G·op(B)ᵀ and dop(B) = α·op(A)ᵀ·G,
// transposed back when the attribute transposed the operand; dC is β·G
// summed over C's broadcast axes. Unneeded gradients are skipped.
func (op *gemmOp) BackwardFor(in, out, gradOut []*tensor.Tensor, need []bool) ([]*tensor.Tensor, error) {
	a, b, g := in[0], in[1], gradOut[0]
	m, n, k, err := op.dims(a.Shape, b.Shape)
	if err != nil {
		return nil, err
	}
	var da, db *tensor.Tensor
	lda, ldb := a.Shape[1], b.Shape[1]
	if !need[0] {
		// skip dA
	} else if da = tensor.New(a.Shape...); op.transA {
		// A is k×m: dA = α·op(B)·Gᵀ  (k×m)
		op.gemm.Sgemm(op.transB, true, k, m, n, op.alpha, b.F32, ldb, g.F32, n, 0, da.F32, lda)
	} else {
		// dA = α·G·op(B)ᵀ  (m×k)
		op.gemm.Sgemm(false, !op.transB, m, k, n, op.alpha, g.F32, n, b.F32, ldb, 0, da.F32, lda)
	}
	if !need[1] {
		// skip dB
	} else if db = tensor.New(b.Shape...); op.transB {
		// B is n×k: dB = α·Gᵀ·op(A)  (n×k)
		op.gemm.Sgemm(true, op.transA, n, k, m, op.alpha, g.F32, n, a.F32, lda, 0, db.F32, ldb)
	} else {
		// dB = α·op(A)ᵀ·G  (k×n)
		op.gemm.Sgemm(!op.transA, false, k, n, m, op.alpha, a.F32, lda, g.F32, n, 0, db.F32, ldb)
	}
	res := []*tensor.Tensor{da, db}
	if len(in) > 2 {
		var dc *tensor.Tensor
		if c := in[2]; c != nil && need[2] {
			dc = tensor.New(c.Shape...)
			if op.beta != 0 {
				rs, cs, err := gemmBiasStrides(c.Shape, m, n)
				if err != nil {
					return nil, err
				}
				for i := 0; i < m; i++ {
					for j := 0; j < n; j++ {
						dc.F32[i*rs+j*cs] += op.beta * g.F32[i*n+j]
					}
				}
			}
		}
		res = append(res, dc)
	}
	return res, nil
}

// matMulOp is ONNX MatMul with numpy semantics: 1-D operands are promoted
// (a leading or trailing 1 that is removed again), batch dims broadcast.
type matMulOp struct{ gemm kernel.GEMM }

func buildMatMul(n *onnx.Node, env *Env) (Op, error) {
	if len(n.Inputs) != 2 {
		return nil, fmt.Errorf("MatMul needs 2 inputs, got %d", len(n.Inputs))
	}
	return &matMulOp{gemm: onTeam(env.GEMM, env.team)}, nil
}

// matMulPlan is the resolved broadcast problem.
type matMulPlan struct {
	m, n, k int
	batch   []int // broadcast batch shape
	aOff    []int // per batch index, offset of the A matrix
	bOff    []int
	out     []int // output shape
}

func planMatMul(as, bs []int) (*matMulPlan, error) {
	if len(as) == 0 || len(bs) == 0 {
		return nil, fmt.Errorf("MatMul of scalar shapes %v, %v", as, bs)
	}
	a, b := as, bs
	if len(a) == 1 {
		a = []int{1, a[0]}
	}
	if len(b) == 1 {
		b = []int{b[0], 1}
	}
	p := &matMulPlan{m: a[len(a)-2], k: a[len(a)-1], n: b[len(b)-1]}
	if b[len(b)-2] != p.k {
		return nil, fmt.Errorf("shapes %v and %v do not multiply", as, bs)
	}
	ab, bb := a[:len(a)-2], b[:len(b)-2]
	r := max(len(ab), len(bb))
	p.batch = make([]int, r)
	for i := 0; i < r; i++ {
		da, db := 1, 1
		if j := i - (r - len(ab)); j >= 0 {
			da = ab[j]
		}
		if j := i - (r - len(bb)); j >= 0 {
			db = bb[j]
		}
		switch {
		case da == db, db == 1:
			p.batch[i] = da
		case da == 1:
			p.batch[i] = db
		default:
			return nil, fmt.Errorf("batch dimensions of %v and %v do not broadcast", as, bs)
		}
	}
	nb := tensor.Numel(p.batch)
	p.aOff, p.bOff = make([]int, nb), make([]int, nb)
	idx := make([]int, r)
	for bi := 0; bi < nb; bi++ {
		oa, ob := 0, 0
		for i := 0; i < r; i++ {
			if j := i - (r - len(ab)); j >= 0 {
				oa = oa*ab[j] + min(idx[i], ab[j]-1)
			}
			if j := i - (r - len(bb)); j >= 0 {
				ob = ob*bb[j] + min(idx[i], bb[j]-1)
			}
		}
		p.aOff[bi], p.bOff[bi] = oa*p.m*p.k, ob*p.k*p.n
		for i := r - 1; i >= 0; i-- {
			idx[i]++
			if idx[i] < p.batch[i] {
				break
			}
			idx[i] = 0
		}
	}
	p.out = append([]int(nil), p.batch...)
	if len(as) > 1 {
		p.out = append(p.out, p.m)
	}
	if len(bs) > 1 {
		p.out = append(p.out, p.n)
	}
	return p, nil
}

func (op *matMulOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	a, b := in[0], in[1]
	if err := wantFloat(a, "A", 1); err != nil {
		return nil, err
	}
	if err := wantFloat(b, "B", 1); err != nil {
		return nil, err
	}
	p, err := planMatMul(a.Shape, b.Shape)
	if err != nil {
		return nil, err
	}
	y := tensor.New(p.out...)
	mn := p.m * p.n
	for bi := range p.aOff {
		op.gemm.Sgemm(false, false, p.m, p.n, p.k, 1, a.F32[p.aOff[bi]:], p.k, b.F32[p.bOff[bi]:], p.n, 0, y.F32[bi*mn:(bi+1)*mn], p.n)
	}
	return []*tensor.Tensor{y}, nil
}

func (op *matMulOp) BackwardNeeds() (in, out []int) { return []int{0, 1}, nil }

// BackwardNeedsFor implements SelectiveBackward.
func (op *matMulOp) BackwardNeedsFor(need []bool) (in, out []int) { return crossNeeds(need), nil }

func (op *matMulOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return op.BackwardFor(in, out, gradOut, []bool{true, true})
}

// BackwardFor: dA_b = G_b·B_bᵀ and dB_b = A_bᵀ·G_b, accumulated (beta 1)
// into the operand slot each broadcast batch index read from.
func (op *matMulOp) BackwardFor(in, out, gradOut []*tensor.Tensor, need []bool) ([]*tensor.Tensor, error) {
	a, b, g := in[0], in[1], gradOut[0]
	p, err := planMatMul(a.Shape, b.Shape)
	if err != nil {
		return nil, err
	}
	var da, db *tensor.Tensor
	if need[0] {
		da = tensor.New(a.Shape...)
	}
	if need[1] {
		db = tensor.New(b.Shape...)
	}
	mn := p.m * p.n
	for bi := range p.aOff {
		gb := g.F32[bi*mn : (bi+1)*mn]
		if da != nil {
			op.gemm.Sgemm(false, true, p.m, p.k, p.n, 1, gb, p.n, b.F32[p.bOff[bi]:], p.n, 1, da.F32[p.aOff[bi]:], p.k)
		}
		if db != nil {
			op.gemm.Sgemm(true, false, p.k, p.n, p.m, 1, a.F32[p.aOff[bi]:], p.k, gb, p.n, 1, db.F32[p.bOff[bi]:], p.n)
		}
	}
	return []*tensor.Tensor{da, db}, nil
}
