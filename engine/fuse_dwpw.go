package engine

import (
	"fmt"
	"runtime"

	"heedmap/tensor"
)

// Depthwise convolution into pointwise convolution, by bands of rows.
//
// An inverted residual block with expansion factor 1 (MobileNetV2's first
// block, Sandler et al., CVPR 2018) has no expansion: its depthwise layer
// reads the stem's 112×112 map, and a 1×1 projection reads its output
// once. Run one after the other, the depthwise layer splits its planes
// over the cores and the projection splits positions, so each core read
// half of the 1.6 MB it needed from the other core's cache, after the
// whole map had left its own. A pointwise output position reads only the
// same position of every channel, so the two can go by bands of rows:
// each task runs the depthwise layer for all channels over a band of
// output rows (kernel.Im2colPlan.DepthwiseRows, reading only the input
// rows the band needs) and at once the projection over the band's
// positions, while the band is in its core's cache; the caller takes
// bands from the top and the helpers from the bottom, as the slab path
// of the stem before it split its rows. Every value is computed by the
// same kernels with the same operands in the same order as on the
// separate path (DepthwiseRows is DepthwisePlanes row by row, and the
// slab path's Packed.SgemmUnpacked does not depend on where a slab
// begins), so the result is bit for bit the same
// (TestDepthwisePointwiseExact).
//
// The pair is taken in a run that keeps neither the depthwise output nor
// its activation, on the AVX-512 path (SgemmUnpacked), where the
// projection would take the slab path, and when the depthwise layer is
// not itself the second half of an expansion pair (fuse_pwdw.go) and the
// projection heads no residual Add.

// dwpwPair is a depthwise Conv (node dw, possibly the head of a fused
// Conv→activation chain) whose result v is read only by the pointwise
// Conv at node pw, as its input X.
type dwpwPair struct {
	dw, pw int
	v      int
	inner  []int // values the pair never materialises (v included)
}

// planDepthwisePointwise finds the pairs, keyed by the depthwise node.
func planDepthwisePointwise(g *Graph, fp *fusionPlan) map[int]*dwpwPair {
	readers := valueReaders(g)
	taken := map[int]bool{} // depthwise halves of expansion pairs
	for _, pr := range fp.pwdwByPW {
		taken[pr.dw] = true
	}
	pairs := map[int]*dwpwPair{}
	for k, nd := range g.nodes {
		if _, ok := nd.op.(*convOp); !ok || taken[k] || len(nd.out) != 1 || nd.out[0] < 0 {
			continue
		}
		pr := &dwpwPair{dw: k, pw: k + 1, v: nd.out[0], inner: []int{nd.out[0]}}
		if _, ok := fp.head[k]; ok {
			pr.pw = k + 2
			pr.v = g.nodes[k+1].out[0]
			pr.inner = append(pr.inner, pr.v)
		}
		if _, ok := fp.resid[k]; ok || pr.pw >= len(g.nodes) || readers[pr.v] != 1 || g.isOutput[pr.v] {
			continue
		}
		pw := g.nodes[pr.pw]
		if _, ok := pw.op.(*convOp); !ok || len(pw.in) < 2 || pw.in[0] != pr.v || !weightsConst(g, nd) || !weightsConst(g, pw) {
			continue
		}
		if _, ok := fp.resid[pr.pw]; ok {
			continue
		}
		pairs[k] = pr
	}
	return pairs
}

// pendingDW is a depthwise convolution Run has put off until the
// pointwise node that reads it: out stands for its result (shape only),
// op is the operator Run would have run for it, x its input, held until
// then.
type pendingDW struct {
	pair *dwpwPair
	out  *tensor.Tensor
	op   Op
	x    int
}

// dwpwAt returns the pair whose depthwise node is k.
func (g *Graph) dwpwAt(k int) *dwpwPair {
	if g.fusion == nil || g.fusion.dwpwByDW == nil {
		return nil
	}
	return g.fusion.dwpwByDW[k]
}

// deferDepthwise is called for node k, run as op with inputs in; when k is
// the depthwise half of a pair that applies in this run, it returns the
// stand-in for the node's output and records the pending convolution.
func (p *Pass) deferDepthwise(k int, op Op, keep []bool, in []*tensor.Tensor) []*tensor.Tensor {
	g := p.g
	pr := g.dwpwAt(k)
	if pr == nil || p.pending != nil || p.pendingDW != nil {
		return nil
	}
	for _, v := range pr.inner {
		if keep[v] {
			return nil
		}
	}
	dw, _, _, _, ok := chainParts(op)
	if !ok {
		return nil
	}
	pw := g.nodes[pr.pw].op.(*convOp)
	x, w := in[0], in[1]
	if x == nil || w == nil || x.DType != tensor.Float32 || len(x.Shape) != 4 || pw.gemm1 == nil || !pw.gemm1.HasUnpacked() {
		return nil
	}
	s, err := dw.shape(x, w)
	if err != nil || !s.depthwise() || s.mg != 1 || s.spatial != 2 {
		return nil
	}
	if _, err := dw.plans.plan(s.g); err != nil {
		return nil
	}
	wp := p.vals[g.nodes[pr.pw].in[1]]
	if wp == nil || pw.group != 1 || len(wp.Shape) != 4 || wp.Shape[1] != s.m || wp.Shape[2] != 1 || wp.Shape[3] != 1 {
		return nil
	}
	out := &tensor.Tensor{DType: tensor.Float32, Shape: s.g.outShape(s.n, s.m, s.spatial)}
	sp, err := pw.shape(out, wp)
	if err != nil || !sp.pointwise() || !pw.useSlabs(s.m, s.g.oh*s.g.ow) {
		return nil
	}
	p.producedBytes += 4 * int64(tensor.Numel(out.Shape)) // as if computed (split.go)
	p.pendingDW = &pendingDW{pair: pr, out: out, op: op, x: g.nodes[k].in[0]}
	return []*tensor.Tensor{out}
}

// chainParts returns the convolution of op (a Conv, or a Conv→activation
// chain without a residual) and its fused activation.
func chainParts(op Op) (conv *convOp, act actKind, lo, hi float32, ok bool) {
	switch o := op.(type) {
	case *convOp:
		return o, actNone, 0, 0, true
	case *fusedConvAct:
		if o.res >= 0 {
			return nil, 0, 0, 0, false
		}
		return o.conv, o.act, o.lo, o.hi, true
	}
	return nil, 0, 0, 0, false
}

// runPendingDW computes node k when it is the pointwise half of the
// pending pair: op is what Run would run for it, in its inputs with the
// stand-in as X.
func (p *Pass) runPendingDW(k int, op Op, in []*tensor.Tensor) ([]*tensor.Tensor, bool, error) {
	pd := p.pendingDW
	if pd == nil || pd.pair.pw != k || len(in) < 2 || in[0] != pd.out {
		return nil, false, nil
	}
	p.pendingDW = nil
	p.pairs++
	g := p.g
	dwNode := g.nodes[pd.pair.dw]
	dw, dwAct, dwLo, dwHi, ok := chainParts(pd.op)
	if !ok {
		return nil, true, fmt.Errorf("engine: node %d: unexpected operator %T before a pointwise pair", pd.pair.dw, pd.op)
	}
	pw, act, lo, hi, ok := chainParts(op)
	if !ok {
		return nil, true, fmt.Errorf("engine: node %d: unexpected operator %T after a deferred depthwise convolution", k, op)
	}
	var bd, bp []float32
	if len(dwNode.in) > 2 && dwNode.in[2] >= 0 {
		bd = p.vals[dwNode.in[2]].F32
	}
	if len(in) > 2 && in[2] != nil {
		bp = in[2].F32
	}
	x := p.vals[pd.x]
	y, err := pw.forwardAfterDepthwise(dw, x, p.vals[dwNode.in[1]], &epilogue{bias: bd, act: dwAct, lo: dwLo, hi: dwHi}, in[1], &epilogue{bias: bp, act: act, lo: lo, hi: hi})
	if err != nil {
		return nil, true, err
	}
	p.releaseHeld(pd.x, k)
	return y, true, nil
}

// dwpwBandRows is the most output rows a task of forwardAfterDepthwise
// takes: at 112×112 with 32 channels a band of 8 rows is 115 KB of
// depthwise output, read back by the projection from the core's L2.
const dwpwBandRows = 8

// forwardAfterDepthwise computes this pointwise convolution (weights wp,
// epilogue pwEp) of the depthwise convolution dw of x (weights wd,
// epilogue dwEp), band by band of rows (see the top of this file).
func (pw *convOp) forwardAfterDepthwise(dw *convOp, x, wd *tensor.Tensor, dwEp *epilogue, wp *tensor.Tensor, pwEp *epilogue) ([]*tensor.Tensor, error) {
	s1, err := dw.shape(x, wd)
	if err != nil {
		return nil, err
	}
	plan, err := dw.plans.plan(s1.g)
	if err != nil {
		return nil, err
	}
	g1 := s1.g
	c, ohw := s1.m, g1.oh*g1.ow
	m := wp.Shape[0]
	if wp.Len() != m*c || (pwEp.bias != nil && len(pwEp.bias) != m) {
		return nil, fmt.Errorf("engine: pointwise weights %v do not follow a %d-channel depthwise layer", wp.Shape, c)
	}
	y := pw.arena.tensor(s1.n, m, g1.oh, g1.ow)
	db := pw.scr.get(c * ohw) // the depthwise output, written and read band by band
	defer pw.scr.put(db)
	mid := (*db)[:c*ohw]
	kep := kernelEpilogue(dwEp)
	bands := newCappedTaper(g1.oh, runtime.GOMAXPROCS(0), dwpwBandRows)
	for n := 0; n < s1.n; n++ {
		xi := x.F32[n*s1.c*g1.ih*g1.iw : (n+1)*s1.c*g1.ih*g1.iw]
		yi := y.F32[n*m*ohw : (n+1)*m*ohw]
		err := pw.team.run([]int{bands.tasks}, func(_, t int) error {
			r0, r1 := bands.bounds(t)
			sb := dw.scr.get(plan.DepthwiseScratch())
			defer dw.scr.put(sb)
			if err := plan.DepthwiseRows(mid, xi, wd.F32, c, 1, 0, c, r0, r1, &kep, *sb); err != nil {
				return err
			}
			j0, j1 := r0*g1.ow, r1*g1.ow
			if !pw.gemm1.SgemmUnpacked(m, j1-j0, c, wp.F32, c, mid[j0:], ohw, yi[j0:], ohw) {
				return fmt.Errorf("engine: the %v GEMM has no unpacked-B kernel", pw.gemm1.ISA())
			}
			pwEp.apply(yi, ohw, 0, m, j0, j1)
			return nil
		})
		if err != nil {
			return nil, err
		}
	}
	return []*tensor.Tensor{y}, nil
}
