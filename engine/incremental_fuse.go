package engine

import (
	"math"
	"runtime"

	"heedmap/kernel"
)

// Fused patch operators. The incremental evaluator's share of an occlusion
// map that is not matrix products was mostly moving data: gathering each
// operand of an Add into a fresh tensor, writing an output, then a Relu
// reading it and writing another, each step on one core, and a restore
// pass over every patch. Here a Conv on the packed-panel path
// (incremental_panels.go) or a two-input Add writes its patch once, with
// the activation that is its output's only reader applied while the data
// is in cache, on both cores, and the activation node is skipped. This is
// the runtime's own Conv→activation fusion (fuse.go), extended to the
// residual Add→Relu of ResNets; the results are the same float32
// expressions, so bit for bit those of the separate operators.

// planFusion marks the Conv→activation and Add→Relu pairs whose patches
// are computed as one step. The activation must be the next node and the
// only reader of its input, which must not be a graph output.
func (p *incPlan) planFusion() {
	g := p.g
	readers := make([]int, len(g.names))
	for _, nd := range g.nodes {
		for _, v := range nd.in {
			if v >= 0 {
				readers[v]++
			}
		}
	}
	for k := 0; k+1 < len(g.nodes); k++ {
		st, nd, next := &p.steps[k], g.nodes[k], g.nodes[k+1]
		if len(nd.out) != 1 || nd.out[0] < 0 || len(next.in) == 0 || len(next.out) != 1 || next.out[0] < 0 {
			continue
		}
		z := nd.out[0]
		if z == p.out || g.isOutput[z] || readers[z] != 1 || next.in[0] != z || p.steps[k+1].kind != incPointwise {
			continue
		}
		switch {
		case st.kind == incConv && st.panels():
			act, lo, hi, ok := convActivation(g, k)
			if !ok {
				continue
			}
			st.act, st.lo, st.hi = act, lo, hi
		case st.isAdd(nd) && next.src.OpType == "Relu":
			st.act = actRelu
		default:
			continue
		}
		st.actNode = k + 1
		p.steps[k+1].fusedTail = true
	}
}

// panels reports whether a Conv step runs on the packed-panel path.
func (st *incStep) panels() bool {
	return st.kind == incConv && st.group == 1 && st.conv != nil && st.patchOp == nil
}

// isAdd reports whether node nd is an Add of two patches of one shape.
func (st *incStep) isAdd(nd *node) bool {
	return st.kind == incMulti && nd.src.OpType == "Add" && len(nd.in) == 2 && st.spatial[0] && st.spatial[1]
}

// bounds returns the clamp interval of the fused activation.
func (st *incStep) bounds() (lo, hi float32) {
	e := epilogue{act: st.act, lo: st.lo, hi: st.hi}
	return e.bounds()
}

// outValue returns the value a step's patch is stored as: its own output,
// or the fused activation's.
func (p *incPlan) outValue(k int) int {
	st := &p.steps[k]
	if st.act != actNone {
		return p.g.nodes[st.actNode].out[0]
	}
	return p.g.nodes[k].out[0]
}

// runFused computes node k's patch with a fused operator when it has one
// (ok true), returning the patch and the value it belongs to.
func (inc *Incremental) runFused(k int, gm incGeo, vals []*incVal, nb int) (out *incVal, v int, ok bool, err error) {
	p := inc.plan
	st := &p.steps[k]
	switch {
	case st.panels():
		out, err := inc.convPanels(k, gm, vals, nb)
		if out == nil && err == nil {
			return nil, 0, false, nil // geometry the panel path does not take
		}
		return out, p.outValue(k), true, err
	case st.isAdd(p.g.nodes[k]):
		out, err := inc.addPatch(k, gm, vals, nb)
		return out, p.outValue(k), true, err
	}
	return nil, 0, false, nil
}

// incSource is where one channel plane of a value's data for one window
// lies: a rectangle of the map (rows [y0, y0+h), columns [x0, x0+w)) held
// row-major in data, and the kept plane for everything outside it.
type incSource struct {
	data   []float32
	y0, x0 int
	h, w   int
	base   []float32 // the kept plane, W wide
}

// source returns channel ch of value v for window b.
func (inc *Incremental) source(v int, s *incVal, b, ch int) incSource {
	shp := inc.plan.shapes[v]
	c, h, w := shp[1], shp[2], shp[3]
	base := inc.base[v].F32[ch*h*w : (ch+1)*h*w]
	if s.full {
		return incSource{data: s.t.F32[(b*c+ch)*h*w : (b*c+ch+1)*h*w], h: h, w: w, base: base}
	}
	return incSource{data: s.t.F32[(b*c+ch)*s.p*s.q : (b*c+ch+1)*s.p*s.q], y0: s.oy[b], x0: s.ox[b], h: s.p, w: s.q, base: base}
}

// cols returns the columns of row y the source holds itself, [a, b), and
// the data row starting at column a; a == b when the row is all kept.
func (s *incSource) cols(y int) (a, b int, row []float32) {
	if y < s.y0 || y >= s.y0+s.h {
		return 0, 0, nil
	}
	return s.x0, s.x0 + s.w, s.data[(y-s.y0)*s.w:]
}

// addPatch computes an Add of two patches (and its fused Relu) for every
// window over the patch geometry gm, from the operands' patches and kept
// values, on the plan's team: per channel plane of a window, each operand
// is read in place when its patch has the output's placement (the usual
// case: a residual block's last Conv) and gathered into a scratch plane
// otherwise, then one vector loop adds and clamps (kernel.BiasAddClamp).
// Positions where neither operand changed get the kept operands' sum,
// which is the kept output bit for bit (the same float32 expressions), so
// no restore pass is needed.
func (inc *Incremental) addPatch(k int, gm incGeo, vals []*incVal, nb int) (*incVal, error) {
	p := inc.plan
	st := &p.steps[k]
	nd := p.g.nodes[k]
	ov := p.outValue(k)
	shp := p.shapes[ov]
	c, h, w := shp[1], shp[2], shp[3]
	pq := gm.p * gm.q
	out := &incVal{incGeo: gm, t: p.patchTensor(nb, c, gm.p, gm.q), owned: true}
	va, vb := nd.in[0], nd.in[1]
	sa, sb := vals[va], vals[vb]
	planes := nb * c
	tasks := min(planes, 4*runtime.GOMAXPROCS(0))
	lo, hi := st.bounds()
	// A bias of −0 adds nothing, so BiasAddClamp computes
	// min(hi, max(lo, a+b)): ONNX Add, then Relu (max(v, 0)) or nothing.
	negZero := math.Float32frombits(1 << 31)
	err := p.team.run([]int{tasks}, func(_, t int) error {
		var scratch []float32
		for i := planes * t / tasks; i < planes*(t+1)/tasks; i++ {
			b, ch := i/c, i%c
			dst := out.t.F32[i*pq : (i+1)*pq]
			A := inc.source(va, sa, b, ch)
			if a, ok := A.plane(gm, b); ok {
				copy(dst, a)
			} else {
				A.gather(dst, gm, b, h, w)
			}
			B := inc.source(vb, sb, b, ch)
			bp, ok := B.plane(gm, b)
			if !ok {
				if scratch == nil {
					scratch = p.bufs.get(pq)
					defer p.bufs.put(scratch)
				}
				B.gather(scratch, gm, b, h, w)
				bp = scratch
			}
			kernel.BiasAddClamp(dst, bp, negZero, lo, hi)
		}
		return nil
	})
	if err != nil {
		p.bufs.put(out.t.F32)
		return nil, err
	}
	return out, nil
}

// plane returns the source's data as window b's plane of patch geometry
// gm, when it is laid out exactly so.
func (s *incSource) plane(gm incGeo, b int) ([]float32, bool) {
	if s.y0 == gm.oy[b] && s.x0 == gm.ox[b] && s.h == gm.p && s.w == gm.q {
		return s.data[:gm.p*gm.q], true
	}
	return nil, false
}

// gather writes the source over window b's patch (geometry gm, inside the
// h×w map) into dst.
func (s *incSource) gather(dst []float32, gm incGeo, b, h, w int) {
	for r := 0; r < gm.p; r++ {
		gatherRow(dst[r*gm.q:(r+1)*gm.q], s, gm.oy[b]+r, gm.ox[b], h, w)
	}
}
