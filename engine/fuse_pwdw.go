package engine

import (
	"fmt"
	"runtime"

	"heedmap/tensor"
)

// Pointwise convolution into depthwise convolution, by channel blocks.
//
// The inverted residual blocks of MobileNetV2 (Sandler et al., CVPR 2018)
// expand a map with a 1×1 convolution (and ReLU6) and read the result with
// a 3×3 depthwise convolution, once. At 112×112 the expansion writes 4.8
// MB per image that the depthwise layer reads back, beyond the 2 MB L2 of
// the cores this was measured on. A depthwise output channel reads only
// its own input channel, so the two can go by blocks of output channels:
// each task computes a block of the expansion for the whole map into a
// scratch block that stays in its core's cache (12 channels of 112×112
// are 600 KB), applies the expansion's bias and activation, and runs the
// depthwise layer over those planes. The expanded tensor is never
// written. Every value is computed by the same kernels with the same
// operands in the same order as on the separate path (Packed.SgemmUnpacked
// for the slab path's pointwise layers, then the epilogue, then
// DepthwisePlanes), so the result is bit for bit the same
// (TestPointwiseDepthwiseExact).
//
// The pair is taken only in a run that keeps neither the expansion nor
// its activation (so never for Backward, which reads the activation's
// mask), on the AVX-512 path that has the unpacked-B GEMM, and where the
// pointwise layer would have taken the slab path (maps of 256 positions
// and more on two cores), the only one whose arithmetic this matches.

// pwdwPair is a pointwise Conv (node pw, possibly the head of a fused
// Conv→activation chain whose tail is node pw+1) whose result v is read
// only by the depthwise Conv at node dw, as its input X.
type pwdwPair struct {
	pw, dw int
	v      int
	chain  *fusedConvAct // the pointwise chain's activation; nil when none
	inner  []int         // values the pair never materialises (v included)
}

// planPointwiseDepthwise finds the pairs, keyed by the pointwise node.
func planPointwiseDepthwise(g *Graph, fp *fusionPlan) map[int]*pwdwPair {
	readers := valueReaders(g)
	pairs := map[int]*pwdwPair{}
	for k, nd := range g.nodes {
		if _, ok := nd.op.(*convOp); !ok || len(nd.out) != 1 || nd.out[0] < 0 {
			continue
		}
		pr := &pwdwPair{pw: k, dw: k + 1, v: nd.out[0], inner: []int{nd.out[0]}}
		if f, ok := fp.head[k]; ok {
			pr.chain, pr.dw = f, k+2
			pr.v = g.nodes[k+1].out[0]
			pr.inner = append(pr.inner, pr.v)
		}
		if pr.dw >= len(g.nodes) || readers[pr.v] != 1 || g.isOutput[pr.v] {
			continue
		}
		dw := g.nodes[pr.dw]
		if _, ok := dw.op.(*convOp); !ok || len(dw.in) < 2 || dw.in[0] != pr.v || !weightsConst(g, nd) || !weightsConst(g, dw) || !oneByOne(g, nd) {
			continue
		}
		if _, ok := fp.resid[pr.dw]; ok {
			continue // the depthwise output feeds an Add: runPending takes no residual
		}
		pairs[k] = pr
	}
	return pairs
}

// oneByOne reports whether a Conv node's constant weights W are 1×1
// filters (Run checks the rest of what makes it pointwise).
func oneByOne(g *Graph, nd *node) bool {
	w := g.consts[nd.in[1]]
	return len(w.Shape) == 4 && w.Shape[2] == 1 && w.Shape[3] == 1
}

// weightsConst reports whether a Conv node's W and B are graph constants.
func weightsConst(g *Graph, nd *node) bool {
	for i := 1; i < len(nd.in) && i < 3; i++ {
		if v := nd.in[i]; v >= 0 && g.consts[v] == nil {
			return false
		}
	}
	return nd.in[1] >= 0
}

// pendingPW is a pointwise product Run has put off until the depthwise
// node that reads it: out stands for its result (shape only), x is its
// input, held until then.
type pendingPW struct {
	pair *pwdwPair
	out  *tensor.Tensor
	x    int // value index of the pointwise input
}

// deferPointwise is called for node k with its inputs; when k is the
// pointwise half of a pair that applies in this run, it returns the
// stand-in for the node's output and records the pending product.
func (p *Pass) deferPointwise(k int, keep []bool, in []*tensor.Tensor) []*tensor.Tensor {
	g := p.g
	pr := g.pwdwAt(k)
	if pr == nil || p.pending != nil || p.pendingDW != nil {
		return nil
	}
	for _, v := range pr.inner {
		if keep[v] {
			return nil
		}
	}
	pw := g.nodes[pr.pw].op.(*convOp)
	dw := g.nodes[pr.dw].op.(*convOp)
	x, w := in[0], in[1]
	if x == nil || w == nil || x.DType != tensor.Float32 || pw.gemm1 == nil || !pw.gemm1.HasUnpacked() {
		return nil
	}
	s, err := pw.shape(x, w)
	if err != nil || !s.pointwise() || pw.group != 1 || len(x.Shape) != 4 || !pw.useSlabs(s.c, s.g.oh*s.g.ow) {
		return nil
	}
	wd := p.vals[g.nodes[pr.dw].in[1]]
	if wd == nil || dw.group != s.m || len(wd.Shape) != 4 || wd.Shape[0] != s.m || wd.Shape[1] != 1 {
		return nil // not depthwise with one output channel per input channel
	}
	out := &tensor.Tensor{DType: tensor.Float32, Shape: s.g.outShape(s.n, s.m, s.spatial)}
	p.producedBytes += 4 * int64(tensor.Numel(out.Shape)) // as if computed (split.go)
	p.pending = &pendingPW{pair: pr, out: out, x: g.nodes[k].in[0]}
	return []*tensor.Tensor{out}
}

// pwdwAt returns the pair whose pointwise node is k.
func (g *Graph) pwdwAt(k int) *pwdwPair {
	if g.fusion == nil || g.fusion.pwdwByPW == nil {
		return nil
	}
	return g.fusion.pwdwByPW[k]
}

// runPending computes node k when it is the depthwise half of the pending
// pair: op is what Run would run for it (the Conv, or its Conv→activation
// chain), in its inputs with the stand-in as X.
func (p *Pass) runPending(k int, op Op, in []*tensor.Tensor) ([]*tensor.Tensor, bool, error) {
	pd := p.pending
	if pd == nil || pd.pair.dw != k || len(in) == 0 || in[0] != pd.out {
		return nil, false, nil
	}
	p.pending = nil
	p.pairs++
	g := p.g
	pwNode := g.nodes[pd.pair.pw]
	pw := pwNode.op.(*convOp)
	pwEp := &epilogue{}
	if f := pd.pair.chain; f != nil {
		pwEp.act, pwEp.lo, pwEp.hi = f.act, f.lo, f.hi
	}
	if len(pwNode.in) > 2 && pwNode.in[2] >= 0 {
		pwEp.bias = p.vals[pwNode.in[2]].F32
	}
	dw, act, lo, hi, ok := chainParts(op)
	if !ok {
		return nil, true, fmt.Errorf("engine: node %d: unexpected operator %T after a deferred pointwise product", k, op)
	}
	y, err := dw.forwardAfterPointwise(pw, p.vals[pd.x], p.vals[pwNode.in[1]], pwEp, in, act, lo, hi)
	if err != nil {
		return nil, true, err
	}
	p.releaseHeld(pd.x, k)
	return y, true, nil
}

// valueReaders counts, for every value of g, the node inputs that read it.
func valueReaders(g *Graph) []int {
	readers := make([]int, len(g.names))
	for _, nd := range g.nodes {
		for _, v := range nd.in {
			if v >= 0 {
				readers[v]++
			}
		}
	}
	return readers
}

// releaseHeld frees value x, the input of a pair's first node that Run
// held for the pair's second node k, when its last reader has run.
func (p *Pass) releaseHeld(x, k int) {
	g := p.g
	if g.lastUse[x] < k && g.producer[x] >= 0 && p.vals[x] != nil && !g.isOutput[x] {
		p.liveBytes -= dataBytes(p.vals[x])
		g.recycle(p, x)
		p.vals[x] = nil
	}
}

// heldForPending reports whether value v is the input of the pending
// pointwise product or depthwise convolution, which Run must not free
// yet.
func (p *Pass) heldForPending(v int) bool {
	return (p.pending != nil && p.pending.x == v) || (p.pendingDW != nil && p.pendingDW.x == v)
}

// pwdwBlock is the most channels forwardAfterPointwise computes at once:
// the GEMM's row tile (Packed.Tile), so whole blocks are whole tiles.
// Tasks are cut in units of pwdwUnit channels (the GEMM's smallest edge
// tile), tapering toward the middle (taper): at 112×112 a block took
// about 45 µs, and with one block per task the core that finished first
// waited up to that long for the other.
const (
	pwdwBlock = 12
	pwdwUnit  = 4
)

// forwardAfterPointwise computes this depthwise convolution (bias from
// in[2], activation act) of the pointwise convolution pw of x (weights
// wp, epilogue pwEp), block by block of channels (see the top of this
// file).
func (dw *convOp) forwardAfterPointwise(pw *convOp, x, wp *tensor.Tensor, pwEp *epilogue, in []*tensor.Tensor, act actKind, lo, hi float32) ([]*tensor.Tensor, error) {
	s1, err := pw.shape(x, wp)
	if err != nil {
		return nil, err
	}
	wd := in[1]
	s2, err := dw.shape(in[0], wd)
	if err != nil {
		return nil, err
	}
	var bd []float32
	if len(in) > 2 && in[2] != nil {
		bd = in[2].F32
	}
	plan, err := dw.plans.plan(s2.g)
	if err != nil {
		return nil, err
	}
	g2 := s2.g
	hw, ohw, k, taps := s1.g.oh*s1.g.ow, g2.oh*g2.ow, s1.c, g2.kh*g2.kw
	m := s1.m
	y := dw.arena.tensor(g2.outShape(s2.n, s2.m, s2.spatial)...)
	kep := kernelEpilogue(&epilogue{bias: bd, act: act, lo: lo, hi: hi})
	tp := newTaper((m+pwdwUnit-1)/pwdwUnit, runtime.GOMAXPROCS(0))
	for n := 0; n < s1.n; n++ {
		xi := x.F32[n*k*hw : (n+1)*k*hw]
		yi := y.F32[n*m*ohw : (n+1)*m*ohw]
		err := dw.team.run([]int{tp.tasks}, func(_, t int) error {
			u0, u1 := tp.bounds(t)
			sb := dw.scr.get(pwdwBlock * hw)
			defer dw.scr.put(sb)
			db := dw.scr.get(plan.DepthwiseScratch())
			defer dw.scr.put(db)
			for m0 := u0 * pwdwUnit; m0 < min(m, u1*pwdwUnit); m0 += pwdwBlock {
				m1 := min(m, u1*pwdwUnit, m0+pwdwBlock)
				mb := m1 - m0
				sc := (*sb)[:mb*hw]
				if !pw.gemm1.SgemmUnpacked(mb, hw, k, wp.F32[m0*k:], k, xi, hw, sc, hw) {
					return fmt.Errorf("engine: the %v GEMM has no unpacked-B kernel", pw.gemm1.ISA())
				}
				pwEp.forGroup(m0).apply(sc, hw, 0, mb, 0, hw)
				bk := kep
				if bk.Bias != nil {
					bk.Bias = bk.Bias[m0:m1]
				}
				if err := plan.DepthwisePlanes(yi[m0*ohw:m1*ohw], sc, wd.F32[m0*taps:m1*taps], mb, 1, 0, mb, &bk, *db); err != nil {
					return err
				}
			}
			return nil
		})
		if err != nil {
			return nil, err
		}
	}
	return []*tensor.Tensor{y}, nil
}
