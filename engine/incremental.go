package engine

import (
	"context"
	"fmt"
	"math"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

// Rect is a half-open rectangle [X0, X1) × [Y0, Y1) of a spatial map.
type Rect struct{ X0, Y0, X1, Y1 int }

func (r Rect) empty() bool { return r.X0 >= r.X1 || r.Y0 >= r.Y1 }

func (r Rect) union(s Rect) Rect {
	switch {
	case r.empty():
		return s
	case s.empty():
		return r
	}
	return Rect{min(r.X0, s.X0), min(r.Y0, s.Y0), max(r.X1, s.X1), max(r.Y1, s.Y1)}
}

// Incremental evaluates a network on many copies of one image that each
// differ from it in a small rectangle, recomputing only what a rectangle can
// reach (exact incremental inference, Nakandala, Kumar & Papakonstantinou,
// "Incremental and Approximate Inference for Faster Occlusion-based Deep CNN
// Explanations", SIGMOD 2019). The unchanged image is run once and every
// activation kept. For a batch of changed rectangles each spatial operator
// maps its input's changed rectangle to the output positions whose receptive
// field meets it, recomputes just that output patch from the kept
// activations overlaid with the upstream patches, and passes the patch on.
// Once a patch covers its whole map, or the graph leaves 4-D spatial
// tensors (global pooling, Flatten, Gemm), the rest of the graph runs in
// full on the batch, which is what an ordinary batched forward pass does.
//
// Supported in patch form: Conv (any kernel, stride, dilation, pads and
// group; auto_pad resolved against the kept shapes), MaxPool, AveragePool
// (unless padding is excluded from the divisor), BatchNormalization and
// elementwise operators whose other inputs are constant across space,
// elementwise operators of several changed inputs (Add of a skip
// connection), Concat over channels and spatial constant Pad. Any other
// operator reached by a patch makes its output fully recomputed: still
// exact, only slower; Fallbacks lists those nodes.
//
// Within one batch every patch of a layer has the same size (the largest
// in the batch, slid inward at the borders), so patches are plain
// [B, C, P, Q] tensors. A Conv on the packed-panel path multiplies only
// each window's changed box, windows of one box size side by side in one
// product (incremental_panels.go), with the bias, a following Relu or
// Clip, and the kept values outside the changed rectangles written in the
// same pass; a residual Add and its Relu are one pass too
// (incremental_fuse.go). Every buffer a batch needs comes from the plan's
// free lists (incBufs), so a steady batch allocates almost nothing.
// Results equal a full forward pass up to the order of float summation,
// and do not depend on how windows are batched.
//
// An Incremental holds the kept activations of one image; it is safe for
// concurrent Occlude calls.
type Incremental struct {
	plan *incPlan
	base []*tensor.Tensor // every value of the unchanged pass (nil if unused)
}

// incPlan is the static analysis of a graph for one input shape, shared by
// the Incrementals of every image of that shape.
type incPlan struct {
	g         *Graph
	in, out   int
	shapes    [][]int
	steps     []incStep // parallel to g.nodes
	fallbacks []string
	// bufs recycles every buffer a batch creates: patches, gathered
	// inputs, panels and products (see incBufs).
	bufs incBufs
	// team runs the parallel phases of patch operators (team.go): the
	// same helpers for every node of every batch, so no goroutine is
	// started per node.
	team *team
}

// buf returns n floats of arbitrary contents from the plan's free lists.
func (p *incPlan) buf(n int) *[]float32 {
	b := p.bufs.get(n)
	return &b
}

// release hands a buffer from buf back.
func (p *incPlan) release(b *[]float32) { p.bufs.put(*b) }

// patchTensor returns a [nb, c, ph, pw] tensor with arbitrary contents
// from the plan's free lists; the caller writes every element.
func (p *incPlan) patchTensor(nb, c, ph, pw int) *tensor.Tensor {
	return tensor.FromFloat32(p.bufs.get(nb*c*ph*pw), nb, c, ph, pw)
}

type incKind int

const (
	incFull      incKind = iota // recompute in full on the batch
	incConv                     // Conv on a patch
	incPool                     // MaxPool/AveragePool through a zero-padding copy of the op
	incPointwise                // one spatial input; the others constant across space
	incMulti                    // elementwise over several spatial inputs of one shape
	incConcat                   // Concat over channels
	incPad                      // spatial constant Pad: the patch only moves
)

type incStep struct {
	kind    incKind
	spatial []bool // which inputs are spatial (varying 4-D) values
	g       geom2  // Conv, pools: resolved on the kept shapes
	// Conv
	group, m, cg int
	w, b         []float32
	gemm         kernel.GEMM
	conv         *convOp // the compiled Conv, for its panel path; nil when it has none
	// pools
	patchOp Op
	fill    float32
	// Pad
	padT, padL int
	// MAC count of one full evaluation (Conv, Gemm, MatMul), per image.
	fullMACs int64
	reason   string // why a node that reads a patch is recomputed in full
	// Activation fusion (incremental_fuse.go): act is the activation a
	// Conv or Add applies to its patch on behalf of node actNode, the
	// only reader of its output; fusedTail marks such activation nodes.
	act       actKind
	lo, hi    float32
	actNode   int
	fusedTail bool
	plans     *incPanelPlans // im2col plans by patch size (panel Convs)
}

// NewIncremental runs x [1, C, H, W] (the graph input named input) through
// g, keeps every activation and plans incremental evaluation of the output
// named output.
func NewIncremental(ctx context.Context, g *Graph, input, output string, x *tensor.Tensor) (*Incremental, error) {
	in, ok := g.index[input]
	if !ok {
		return nil, fmt.Errorf("engine: incremental: graph has no value %q", input)
	}
	out, ok := g.index[output]
	if !ok {
		return nil, fmt.Errorf("engine: incremental: graph has no value %q", output)
	}
	if x == nil || x.DType != tensor.Float32 || len(x.Shape) != 4 || x.Shape[0] != 1 {
		return nil, fmt.Errorf("engine: incremental: input must be a float [1, C, H, W] tensor, got %v", x)
	}
	base, shapes, err := g.runKeepAll(ctx, input, x)
	if err != nil {
		return nil, err
	}
	p := &incPlan{g: g, in: in, out: out, shapes: shapes, team: newTeam()}
	p.analyse()
	return &Incremental{plan: p, base: base}, nil
}

// Rebase returns an Incremental for another image of the same shape,
// reusing the plan.
func (inc *Incremental) Rebase(ctx context.Context, x *tensor.Tensor) (*Incremental, error) {
	p := inc.plan
	if x == nil || x.DType != tensor.Float32 || !shapeEq(x.Shape, p.shapes[p.in]) {
		return nil, fmt.Errorf("engine: incremental: rebase needs an input of shape %v, got %v", p.shapes[p.in], x)
	}
	base, shapes, err := p.g.runKeepAll(ctx, p.g.names[p.in], x)
	if err != nil {
		return nil, err
	}
	for v, s := range shapes {
		if s != nil && !shapeEq(s, p.shapes[v]) {
			return nil, fmt.Errorf("engine: incremental: value %q has shape %v for this image, %v in the plan", p.g.names[v], s, p.shapes[v])
		}
	}
	return &Incremental{plan: p, base: base}, nil
}

// Fallbacks lists the nodes reached by a patch that are recomputed in full
// because their operator has no patch form here, with the reason.
func (inc *Incremental) Fallbacks() []string { return append([]string(nil), inc.plan.fallbacks...) }

// Base returns the kept output of the unchanged image.
func (inc *Incremental) Base() *tensor.Tensor { return inc.base[inc.plan.out] }

func (g *Graph) runKeepAll(ctx context.Context, input string, x *tensor.Tensor) ([]*tensor.Tensor, [][]int, error) {
	var keep []string
	for v, name := range g.names {
		if g.producer[v] >= 0 {
			keep = append(keep, name)
		}
	}
	if len(g.inputs) != 1 {
		return nil, nil, fmt.Errorf("engine: incremental: the graph has %d inputs; only single-input graphs are supported", len(g.inputs))
	}
	pass, err := g.Run(ctx, map[string]*tensor.Tensor{input: x}, RunOptions{Keep: keep})
	if err != nil {
		return nil, nil, err
	}
	shapes := make([][]int, len(g.names))
	for v := range g.names {
		if pass.vals[v] != nil {
			shapes[v] = pass.vals[v].Shape
		}
	}
	return pass.vals, shapes, nil
}

// isSpatial reports whether value v is a 4-D map with more than one
// position whose contents depend on the graph input.
func (p *incPlan) isSpatial(v int) bool {
	s := p.shapes[v]
	return v >= 0 && p.g.varying[v] && len(s) == 4 && s[0] == 1 && s[2]*s[3] > 1
}

// incConstAcrossSpace reports whether a constant of shape s broadcast against
// a [1, C, H, W] map is the same at every position and batch entry.
func incConstAcrossSpace(s []int) bool {
	if len(s) > 4 {
		return false
	}
	pad := make([]int, 4-len(s), 4)
	for i := range pad {
		pad[i] = 1
	}
	a := append(pad, s...)
	return a[0] == 1 && a[2] == 1 && a[3] == 1
}

var incPointwiseOps = map[string]bool{
	"Relu": true, "Clip": true, "Sigmoid": true, "Tanh": true, "LeakyRelu": true, "HardSigmoid": true,
	"HardSwish": true, "Elu": true, "Selu": true, "Softplus": true, "Identity": true, "Dropout": true,
	"BatchNormalization": true, "Neg": true, "Abs": true, "Exp": true, "Erf": true, "Sqrt": true,
	"Add": true, "Sub": true, "Mul": true, "Div": true, "Pow": true, "Max": true, "Min": true,
	"PRelu": true, "Sum": true, "Mean": true, "Celu": true, "ThresholdedRelu": true, "Shrink": true,
}

// analyse decides, for every node, how a patch passes through it.
func (p *incPlan) analyse() {
	g := p.g
	p.steps = make([]incStep, len(g.nodes))
	for k, nd := range g.nodes {
		st := &p.steps[k]
		st.spatial = make([]bool, len(nd.in))
		nSpatial := 0
		for i, v := range nd.in {
			if v >= 0 && p.isSpatial(v) {
				st.spatial[i] = true
				nSpatial++
			}
		}
		st.fullMACs = p.macs(nd)
		if nSpatial == 0 {
			continue // nothing spatial reaches it: a normal node
		}
		outSpatial := true
		for _, v := range nd.out {
			if v >= 0 && !p.isSpatial(v) {
				outSpatial = false
			}
		}
		nOut := 0
		for _, v := range nd.out {
			if v >= 0 {
				nOut++
			}
		}
		if !outSpatial || nOut != 1 || nd.out[0] < 0 {
			st.reason = "leaves the spatial maps"
			continue
		}
		st.kind, st.reason = p.classify(nd, st, nSpatial)
		if st.kind == incFull {
			p.fallbacks = append(p.fallbacks, fmt.Sprintf("%s: %s", nd.label(), st.reason))
		}
	}
	p.planFusion()
}

func (p *incPlan) classify(nd *node, st *incStep, nSpatial int) (incKind, string) {
	g := p.g
	src := nd.src
	xs := p.shapes[nd.in[0]]
	ys := p.shapes[nd.out[0]]
	// Every non-spatial input must be a constant (a kept varying value has
	// batch 1 and would not broadcast against the batch).
	for i, v := range nd.in {
		if v >= 0 && !st.spatial[i] && g.consts[v] == nil {
			return incFull, "an input depends on the image but is not a spatial map (e.g. a squeeze-and-excitation scale)"
		}
	}
	switch src.OpType {
	case "Conv":
		if nSpatial != 1 || !st.spatial[0] {
			return incFull, "weights depend on the image"
		}
		gemm, ok := convGEMM(nd.op)
		if !ok {
			return incFull, "unknown Conv operator"
		}
		w := g.consts[nd.in[1]]
		win, err := parseWindow(src)
		if err != nil || w == nil || len(w.Shape) != 4 {
			return incFull, "not a 2-D convolution"
		}
		geo, err := win.resolve(xs[2:], w.Shape[2:])
		if err != nil {
			return incFull, err.Error()
		}
		st.g, st.gemm, st.conv = geo, gemm, panelConv(nd.op)
		st.plans = &incPanelPlans{}
		st.group = int(src.Int("group", 1))
		st.m, st.cg = w.Shape[0], w.Shape[1]
		st.w = w.F32
		if len(nd.in) > 2 && nd.in[2] >= 0 {
			st.b = g.consts[nd.in[2]].F32
		}
		if st.cg == 1 && st.group == xs[1] {
			// Depthwise: no matrix product to batch, so run the runtime's
			// own kernel on the gathered patches; it then computes every
			// position exactly as the unoccluded pass did, whatever the
			// batch.
			op, err := p.unpadded(src, src.Inputs, gemm)
			if err != nil {
				return incFull, err.Error()
			}
			st.patchOp = op
		}
		return incConv, ""
	case "MaxPool", "AveragePool":
		if len(nd.out) > 1 {
			return incFull, "MaxPool Indices output"
		}
		win, err := parseWindow(src)
		if err != nil || len(win.kernel) != 2 {
			return incFull, "not a 2-D pooling"
		}
		geo, err := win.resolve(xs[2:], int64sToInts(win.kernel))
		if err != nil {
			return incFull, err.Error()
		}
		st.g = geo
		padded := geo.pt+geo.pl+geo.pb+geo.pr > 0
		if src.OpType == "MaxPool" {
			st.fill = float32(math.Inf(-1))
		} else if win.ceil {
			return incFull, "AveragePool with ceil_mode (clipped divisor)"
		} else if padded && src.Int("count_include_pad", 0) == 0 {
			return incFull, "AveragePool excluding padding from the divisor"
		}
		// The same operator without padding, applied to a gathered patch
		// whose out-of-map positions hold the fill value.
		op, err := p.unpadded(src, src.Inputs[:1], st.gemm)
		if err != nil {
			return incFull, err.Error()
		}
		st.patchOp = op
		return incPool, ""
	case "Concat":
		axis := src.Int("axis", 1)
		if axis != 1 && axis != -3 {
			return incFull, "Concat not over channels"
		}
		if nSpatial != len(nd.in) {
			return incFull, "Concat with a constant input"
		}
		return incConcat, ""
	case "Pad":
		if src.String("mode", "constant") != "constant" {
			return incFull, "Pad mode is not constant"
		}
		pads := src.Ints("pads")
		if p.opset() >= 11 {
			if len(nd.in) < 2 || nd.in[1] < 0 || (len(nd.in) > 3 && nd.in[3] >= 0) {
				return incFull, "Pad without constant pads, or with axes"
			}
			c := g.consts[nd.in[1]]
			if c == nil || c.DType != tensor.Int64 {
				return incFull, "Pad pads not constant"
			}
			pads = c.I64
		}
		if len(pads) != 8 || pads[0] != 0 || pads[1] != 0 || pads[4] != 0 || pads[5] != 0 {
			return incFull, "Pad over batch or channels"
		}
		for _, v := range pads {
			if v < 0 {
				return incFull, "Pad crops"
			}
		}
		st.padT, st.padL = int(pads[2]), int(pads[3])
		return incPad, ""
	}
	if !incPointwiseOps[src.OpType] {
		return incFull, "no patch form for " + src.OpType
	}
	for i, v := range nd.in {
		// BatchNormalization's constants are per channel by definition;
		// the other operators broadcast theirs numpy-style.
		if v >= 0 && !st.spatial[i] && src.OpType != "BatchNormalization" && !incConstAcrossSpace(p.shapes[v]) {
			return incFull, "a constant input varies across space"
		}
		if st.spatial[i] && !shapeEq(p.shapes[v], ys) {
			return incFull, "inputs broadcast across space"
		}
	}
	if nSpatial == 1 {
		return incPointwise, ""
	}
	return incMulti, ""
}

// unpadded builds a copy of a window operator without padding (pads,
// auto_pad, ceil_mode removed), to run on gathered patches whose borders
// already hold the padding value.
func (p *incPlan) unpadded(src *onnx.Node, inputs []string, gemm kernel.GEMM) (Op, error) {
	clone := &onnx.Node{Name: src.Name, OpType: src.OpType, Inputs: inputs, Outputs: src.Outputs[:1], Attrs: map[string]*onnx.Attr{}}
	for name, a := range src.Attrs {
		clone.Attrs[name] = a
	}
	delete(clone.Attrs, "pads")
	delete(clone.Attrs, "auto_pad")
	delete(clone.Attrs, "ceil_mode")
	b, ok := lookup(src.OpType)
	if !ok {
		return nil, fmt.Errorf("no operator %s", src.OpType)
	}
	return b(clone, &Env{GEMM: gemm, Opset: p.opset(), team: p.team, scratch: p.g.scratch})
}

func (p *incPlan) opset() int64 {
	m := p.g.model
	if o, ok := m.Opsets[""]; ok {
		return o
	}
	return m.Opsets["ai.onnx"]
}

// macs counts the multiply-adds of one full evaluation of a Conv, Gemm or
// MatMul node (the usual cost measure of a CNN; elementwise work is not
// counted).
func (p *incPlan) macs(nd *node) int64 {
	if len(nd.out) == 0 || nd.out[0] < 0 || p.shapes[nd.out[0]] == nil {
		return 0
	}
	ys := p.shapes[nd.out[0]]
	switch nd.src.OpType {
	case "Conv":
		w := p.shapes[nd.in[1]]
		if w == nil {
			return 0
		}
		k := int64(1)
		for _, d := range w[1:] {
			k *= int64(d)
		}
		return int64(tensor.Numel(ys)) * k
	case "Gemm", "MatMul":
		a := p.shapes[nd.in[0]]
		if len(a) == 0 {
			return 0
		}
		k := int64(a[len(a)-1])
		if nd.src.OpType == "Gemm" && nd.src.Int("transA", 0) != 0 {
			k = int64(a[0])
		}
		return int64(tensor.Numel(ys)) * k
	}
	return 0
}

// incGeo is where a value differs from the kept one, for each window of a
// batch: a patch of P×Q positions at (oy[b], ox[b]) that contains the
// changed rectangle chg[b]. full marks values recomputed in full.
type incGeo struct {
	full   bool
	p, q   int
	oy, ox []int
	chg    []Rect
}

// incVal is a value of a batch: its geometry and data ([B, C, P, Q] patch
// or the full [B, ...] value).
type incVal struct {
	incGeo
	t *tensor.Tensor
	// owned marks data from the plan's free lists that no other value
	// shares; it goes back to them at the value's last use.
	owned bool
}

// incPlace fixes a batch's patch size as the largest changed rectangle and
// slides each patch inside the h×w map.
func incPlace(chg []Rect, h, w int) incGeo {
	gm := incGeo{chg: chg, oy: make([]int, len(chg)), ox: make([]int, len(chg)), p: 1, q: 1}
	for _, r := range chg {
		if !r.empty() {
			gm.p, gm.q = max(gm.p, r.Y1-r.Y0), max(gm.q, r.X1-r.X0)
		}
	}
	gm.p, gm.q = min(gm.p, h), min(gm.q, w)
	for b, r := range chg {
		if r.empty() {
			continue
		}
		gm.oy[b] = max(0, min(r.Y0, h-gm.p))
		gm.ox[b] = max(0, min(r.X0, w-gm.q))
	}
	return gm
}

// incWindowRange maps changed input positions [a, b) along one axis to the
// output positions whose window reads one of them: output o reads
// o·s − pad + t·d for t in [0, k).
func incWindowRange(a, b, k, s, d, pad, n int) (lo, hi int) {
	if a >= b {
		return 0, 0
	}
	lo = incCeilDiv(a+pad-(k-1)*d, s)
	hi = incFloorDiv(b-1+pad, s) + 1
	return max(lo, 0), min(hi, n)
}

func incCeilDiv(a, b int) int { return -incFloorDiv(-a, b) }
func incFloorDiv(a, b int) int {
	q := a / b
	if (a%b != 0) && ((a < 0) != (b < 0)) {
		q--
	}
	return q
}

func (st *incStep) windowChg(r Rect) Rect {
	g := st.g
	y0, y1 := incWindowRange(r.Y0, r.Y1, g.kh, g.sh, g.dh, g.pt, g.oh)
	x0, x1 := incWindowRange(r.X0, r.X1, g.kw, g.sw, g.dw, g.pl, g.ow)
	out := Rect{x0, y0, x1, y1}
	if out.empty() {
		return Rect{}
	}
	return out
}

// geometry computes the output geometry of node k from its inputs'.
func (p *incPlan) geometry(k int, ins []*incGeo) incGeo {
	st := &p.steps[k]
	nd := p.g.nodes[k]
	for i, in := range ins {
		if st.spatial[i] && in.full {
			return incGeo{full: true}
		}
	}
	ys := p.shapes[nd.out[0]]
	var chg []Rect
	switch st.kind {
	case incFull:
		return incGeo{full: true}
	case incConv, incPool:
		src := ins[0]
		chg = make([]Rect, len(src.chg))
		for b, r := range src.chg {
			chg[b] = st.windowChg(r)
		}
	case incPad:
		src := ins[0]
		chg = make([]Rect, len(src.chg))
		for b, r := range src.chg {
			if !r.empty() {
				chg[b] = Rect{r.X0 + st.padL, r.Y0 + st.padT, r.X1 + st.padL, r.Y1 + st.padT}
			}
		}
		gm := incGeo{chg: chg, p: src.p, q: src.q, oy: make([]int, len(chg)), ox: make([]int, len(chg))}
		for b := range chg {
			gm.oy[b], gm.ox[b] = src.oy[b]+st.padT, src.ox[b]+st.padL
		}
		return gm
	case incPointwise:
		for i, in := range ins {
			if st.spatial[i] {
				return *in
			}
		}
	case incMulti, incConcat:
		for i, in := range ins {
			if !st.spatial[i] {
				continue
			}
			if chg == nil {
				chg = make([]Rect, len(in.chg))
			}
			for b, r := range in.chg {
				chg[b] = chg[b].union(r)
			}
		}
	}
	return incPlace(chg, ys[2], ys[3])
}

// Occlude evaluates the graph output for len(rects) copies of the image,
// copy b having the pixels of rects[b] replaced by those of fill (same
// shape as the image). It returns the output with a leading batch
// dimension of len(rects).
func (inc *Incremental) Occlude(ctx context.Context, fill *tensor.Tensor, rects []Rect) (*tensor.Tensor, error) {
	p := inc.plan
	xs := p.shapes[p.in]
	if fill == nil || fill.DType != tensor.Float32 || !shapeEq(fill.Shape, xs) {
		return nil, fmt.Errorf("engine: incremental: fill must have the input's shape %v, got %v", xs, fill)
	}
	if len(rects) == 0 {
		return nil, fmt.Errorf("engine: incremental: no rectangles")
	}
	h, w := xs[2], xs[3]
	chg := make([]Rect, len(rects))
	for b, r := range rects {
		chg[b] = Rect{max(r.X0, 0), max(r.Y0, 0), min(r.X1, w), min(r.Y1, h)}
	}
	vals := make([]*incVal, len(p.g.names))
	// Whatever the batch still owns when it ends (an error, a cancelled
	// context) goes back to the free lists; the output is handed over.
	defer func() {
		for v, s := range vals {
			if v != p.out && s != nil && s.owned {
				p.bufs.put(s.t.F32)
			}
		}
	}()
	x0 := &incVal{incGeo: incPlace(chg, h, w), owned: true}
	x0.t = p.patchTensor(len(rects), xs[1], x0.p, x0.q)
	for b := range rects {
		dst := x0.t.F32[b*xs[1]*x0.p*x0.q : (b+1)*xs[1]*x0.p*x0.q]
		incGatherPlane(inc.base[p.in].F32, xs[1], h, w, x0.oy[b], x0.ox[b], x0.p, x0.q, 0, dst, x0.p*x0.q)
		// Overlay the fill inside the rectangle.
		r := chg[b]
		for c := 0; c < xs[1]; c++ {
			for y := r.Y0; y < r.Y1; y++ {
				row := dst[(c*x0.p+y-x0.oy[b])*x0.q:]
				copy(row[r.X0-x0.ox[b]:r.X1-x0.ox[b]], fill.F32[(c*h+y)*w+r.X0:(c*h+y)*w+r.X1])
			}
		}
	}
	vals[p.in] = x0
	nb := len(rects)
	geos := make([]*incGeo, 0, 8)
	for k, nd := range p.g.nodes {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		st := &p.steps[k]
		if st.fusedTail && vals[nd.out[0]] != nil {
			// The producer applied this activation to its patch.
			inc.dropInputs(vals, k)
			continue
		}
		geos = geos[:0]
		reached := false
		for i, v := range nd.in {
			if v >= 0 && st.spatial[i] {
				if vals[v] == nil {
					vals[v] = &incVal{incGeo: incGeo{full: true}, t: inc.materialize(v, nil, nb), owned: true}
				}
				geos = append(geos, &vals[v].incGeo)
				reached = true
			} else {
				geos = append(geos, nil)
			}
		}
		var err error
		if reached && st.kind != incFull {
			gm := p.geometry(k, geos)
			if gm.full {
				err = inc.runFull(k, vals, nb)
			} else {
				var out *incVal
				var ov int
				if out, ov, err = inc.runPatch(k, gm, vals, nb); err == nil {
					vals[ov] = out
				}
			}
		} else {
			err = inc.runFull(k, vals, nb)
		}
		if err != nil {
			return nil, fmt.Errorf("engine: incremental: %s: %w", nd.label(), err)
		}
		inc.dropInputs(vals, k)
	}
	o := vals[p.out]
	if o == nil {
		return nil, fmt.Errorf("engine: incremental: output %q not computed", p.g.names[p.out])
	}
	if o.full {
		vals[p.out] = nil
		return o.t, nil
	}
	return inc.materialize(p.out, o, nb), nil
}

// dropInputs ends the values node k reads last, handing owned buffers
// back to the free lists.
func (inc *Incremental) dropInputs(vals []*incVal, k int) {
	p := inc.plan
	for _, v := range p.g.nodes[k].in {
		if v < 0 || p.g.lastUse[v] != k || v == p.out {
			continue
		}
		if s := vals[v]; s != nil && s.owned {
			p.bufs.put(s.t.F32)
		}
		vals[v] = nil
	}
}

// materialize returns value v in full for every window: the kept value
// with the window's patch written over it.
func (inc *Incremental) materialize(v int, s *incVal, nb int) *tensor.Tensor {
	base := inc.base[v]
	if base == nil {
		base = inc.plan.g.consts[v]
	}
	if s != nil && s.full {
		return s.t
	}
	shape := append([]int{nb}, base.Shape[1:]...)
	t := tensor.FromFloat32(inc.plan.bufs.get(nb*base.Len()), shape...)
	n := base.Len()
	for b := 0; b < nb; b++ {
		copy(t.F32[b*n:(b+1)*n], base.F32)
	}
	if s == nil {
		return t
	}
	c, h, w := base.Shape[1], base.Shape[2], base.Shape[3]
	for b := 0; b < nb; b++ {
		dst := t.F32[b*n : (b+1)*n]
		src := s.t.F32[b*c*s.p*s.q:]
		for ch := 0; ch < c; ch++ {
			for y := 0; y < s.p; y++ {
				copy(dst[(ch*h+s.oy[b]+y)*w+s.ox[b]:][:s.q], src[(ch*s.p+y)*s.q:][:s.q])
			}
		}
	}
	return t
}

// runFull evaluates node k on the whole batch, materialising patched
// inputs, and stores its outputs in vals.
func (inc *Incremental) runFull(k int, vals []*incVal, nb int) error {
	p := inc.plan
	nd := p.g.nodes[k]
	in := make([]*tensor.Tensor, len(nd.in))
	for i, v := range nd.in {
		switch {
		case v < 0:
		case p.g.consts[v] != nil:
			in[i] = p.g.consts[v]
		default:
			s := vals[v]
			if s == nil {
				return fmt.Errorf("input %q not available", p.g.names[v])
			}
			if !s.full {
				old := s
				s = &incVal{incGeo: incGeo{full: true}, t: inc.materialize(v, s, nb), owned: true}
				vals[v] = s
				if old.owned {
					p.bufs.put(old.t.F32)
				}
			}
			in[i] = s.t
		}
	}
	out, err := safeForward(nd.op, in)
	if err != nil {
		return err
	}
	// An output that is a view of a materialised input (Identity,
	// Reshape) keeps that buffer alive: it leaves the free lists' care.
	for _, v := range nd.in {
		if s := vals[max(v, 0)]; v >= 0 && s != nil && s.owned {
			for _, o := range out {
				if o != nil && o.DType == tensor.Float32 && backing(o.F32) == backing(s.t.F32) {
					s.owned = false
				}
			}
		}
	}
	for i, v := range nd.out {
		if v < 0 {
			continue
		}
		if i >= len(out) || out[i] == nil {
			return fmt.Errorf("output %d not produced", i)
		}
		vals[v] = &incVal{incGeo: incGeo{full: true}, t: out[i]}
	}
	return nil
}

// incGatherPlane writes rows [y0, y0+ph) × cols [x0, x0+pw) of a C×H×W map
// into dst (C blocks of ph×pw, cs floats apart), with fill outside the map.
func incGatherPlane(src []float32, c, h, w, y0, x0, ph, pw int, fill float32, dst []float32, cs int) {
	xa, xb := max(x0, 0), min(x0+pw, w)
	for ch := 0; ch < c; ch++ {
		for i := 0; i < ph; i++ {
			row := dst[ch*cs+i*pw : ch*cs+(i+1)*pw]
			y := y0 + i
			if y < 0 || y >= h || xa >= xb {
				for j := range row {
					row[j] = fill
				}
				continue
			}
			for j := 0; j < xa-x0; j++ {
				row[j] = fill
			}
			copy(row[xa-x0:xb-x0], src[(ch*h+y)*w+xa:(ch*h+y)*w+xb])
			for j := xb - x0; j < pw; j++ {
				row[j] = fill
			}
		}
	}
}

// gather writes value v of window b over rows [y0, y0+ph) × cols
// [x0, x0+pw) into dst (C blocks of ph×pw, cs floats apart): the kept
// value, overlaid with the window's patch, and fill outside the map.
func (inc *Incremental) gather(v int, s *incVal, b, y0, x0, ph, pw int, fill float32, dst []float32, cs int) {
	shp := inc.plan.shapes[v]
	c, h, w := shp[1], shp[2], shp[3]
	if s.full {
		incGatherPlane(s.t.F32[b*c*h*w:(b+1)*c*h*w], c, h, w, y0, x0, ph, pw, fill, dst, cs)
		return
	}
	incGatherPlane(inc.base[v].F32, c, h, w, y0, x0, ph, pw, fill, dst, cs)
	// Overlay the patch where it meets the requested region.
	ya, yb := max(y0, s.oy[b]), min(y0+ph, s.oy[b]+s.p)
	xa, xb := max(x0, s.ox[b]), min(x0+pw, s.ox[b]+s.q)
	if ya >= yb || xa >= xb {
		return
	}
	pt := s.t.F32[b*c*s.p*s.q:]
	for ch := 0; ch < c; ch++ {
		for y := ya; y < yb; y++ {
			copy(dst[ch*cs+(y-y0)*pw+xa-x0:][:xb-xa], pt[(ch*s.p+y-s.oy[b])*s.q+xa-s.ox[b]:][:xb-xa])
		}
	}
}

// runPatch computes node k's output patch for geometry gm. It returns the
// patch and the value it belongs to: node k's output, or the output of the
// activation node fused into it (incremental_fuse.go).
func (inc *Incremental) runPatch(k int, gm incGeo, vals []*incVal, nb int) (*incVal, int, error) {
	p := inc.plan
	st := &p.steps[k]
	nd := p.g.nodes[k]
	if out, v, ok, err := inc.runFused(k, gm, vals, nb); ok || err != nil {
		return out, v, err
	}
	out, err := inc.runPatchOp(k, gm, vals, nb)
	if err != nil {
		return nil, 0, err
	}
	want := []int{nb, p.shapes[nd.out[0]][1], gm.p, gm.q}
	if !shapeEq(out.t.Shape, want) {
		return nil, 0, fmt.Errorf("patch output %v, want %v", out.t.Shape, want)
	}
	// An operator may hand back an input unchanged (Identity, Dropout):
	// the data then changes hands rather than being shared.
	for i, v := range nd.in {
		if v < 0 || !st.spatial[i] {
			continue
		}
		if s := vals[v]; s != nil && s.owned && !out.owned && backing(s.t.F32) == backing(out.t.F32) {
			s.owned, out.owned = false, true
		}
	}
	if st.kind != incPad {
		inc.restore(nd.out[0], out)
	}
	return out, nd.out[0], nil
}

// runPatchOp is runPatch for the operators without a fused form here.
func (inc *Incremental) runPatchOp(k int, gm incGeo, vals []*incVal, nb int) (*incVal, error) {
	p := inc.plan
	st := &p.steps[k]
	nd := p.g.nodes[k]
	out := &incVal{incGeo: gm}
	// Gathered operands go back to the free lists at the end, unless the
	// operator handed one back as its output (a Sum of one input, say).
	var temps [][]float32
	defer func() {
		for _, b := range temps {
			if out.t != nil && backing(b) == backing(out.t.F32) {
				out.owned = true
				continue
			}
			p.bufs.put(b)
		}
	}()
	switch st.kind {
	case incPad:
		in := vals[nd.in[0]]
		out.t, out.owned = in.t, in.owned
		in.owned = false
		return out, nil
	case incPointwise:
		in := make([]*tensor.Tensor, len(nd.in))
		for i, v := range nd.in {
			switch {
			case v < 0:
			case st.spatial[i]:
				in[i] = vals[v].t
			default:
				in[i] = p.g.consts[v]
			}
		}
		r, err := safeForward(nd.op, in)
		if err != nil {
			return nil, err
		}
		out.t = r[0]
	case incMulti, incConcat:
		in := make([]*tensor.Tensor, len(nd.in))
		for i, v := range nd.in {
			switch {
			case v < 0:
			case st.spatial[i]:
				c := p.shapes[v][1]
				t := p.patchTensor(nb, c, gm.p, gm.q)
				temps = append(temps, t.F32)
				for b := 0; b < nb; b++ {
					inc.gather(v, vals[v], b, gm.oy[b], gm.ox[b], gm.p, gm.q, 0, t.F32[b*c*gm.p*gm.q:(b+1)*c*gm.p*gm.q], gm.p*gm.q)
				}
				in[i] = t
			default:
				in[i] = p.g.consts[v]
			}
		}
		r, err := safeForward(nd.op, in)
		if err != nil {
			return nil, err
		}
		out.t = r[0]
	case incConv, incPool:
		v := nd.in[0]
		c := p.shapes[v][1]
		g := st.g
		ih := (gm.p-1)*g.sh + (g.kh-1)*g.dh + 1
		iw := (gm.q-1)*g.sw + (g.kw-1)*g.dw + 1
		if st.kind == incConv && st.group == 1 && g.kh == 1 && g.kw == 1 && g.sh == 1 && g.sw == 1 {
			// A pointwise convolution's columns are its input patch with
			// channels outermost: gather straight into that layout and
			// skip im2col.
			pq := gm.p * gm.q
			cb := p.buf(c * nb * pq)
			defer p.release(cb)
			p.parallel(nb, func(b int) {
				inc.gather(v, vals[v], b, gm.oy[b]-g.pt, gm.ox[b]-g.pl, gm.p, gm.q, 0, (*cb)[b*pq:], nb*pq)
			})
			out.t, out.owned = st.convCols(p, *cb, nb, gm.p, gm.q), true
			break
		}
		xb := p.buf(nb * c * ih * iw)
		temps = append(temps, *xb)
		xt := tensor.FromFloat32(*xb, nb, c, ih, iw)
		p.parallel(nb, func(b int) {
			inc.gather(v, vals[v], b, gm.oy[b]*g.sh-g.pt, gm.ox[b]*g.sw-g.pl, ih, iw, st.fill, xt.F32[b*c*ih*iw:(b+1)*c*ih*iw], ih*iw)
		})
		if st.patchOp != nil {
			in := []*tensor.Tensor{xt}
			if st.kind == incConv {
				in = append(in, p.g.consts[nd.in[1]])
				if len(nd.in) > 2 && nd.in[2] >= 0 {
					in = append(in, p.g.consts[nd.in[2]])
				}
			}
			r, err := safeForward(st.patchOp, in)
			if err != nil {
				return nil, err
			}
			out.t = r[0]
		} else {
			out.t, out.owned = st.convPatch(p, xt, c, gm.p, gm.q), true
		}
	default:
		return nil, fmt.Errorf("no patch form")
	}
	return out, nil
}

// restore writes the kept values back over the positions of a patch that
// lie outside its window's changed rectangle. Those positions were
// recomputed only because a batch shares one patch size; restoring them
// makes each window's result independent of which windows share its batch
// (and of the batch size), bit for bit, even where a patch kernel rounds
// differently from the kernel of the unoccluded pass.
func (inc *Incremental) restore(v int, s *incVal) {
	base := inc.base[v]
	c, h, w := base.Shape[1], base.Shape[2], base.Shape[3]
	for b, r := range s.chg {
		pt := s.t.F32[b*c*s.p*s.q : (b+1)*c*s.p*s.q]
		oy, ox := s.oy[b], s.ox[b]
		for ch := 0; ch < c; ch++ {
			for i := 0; i < s.p; i++ {
				y := oy + i
				row := pt[(ch*s.p+i)*s.q : (ch*s.p+i+1)*s.q]
				src := base.F32[(ch*h+y)*w+ox : (ch*h+y)*w+ox+s.q]
				if r.empty() || y < r.Y0 || y >= r.Y1 {
					copy(row, src)
					continue
				}
				copy(row[:r.X0-ox], src[:r.X0-ox])
				copy(row[r.X1-ox:], src[r.X1-ox:])
			}
		}
	}
}

// convPatch convolves a batch of gathered input patches x [B, C, IH, IW]
// (padding already in place) into [B, M, P, Q]. All windows share one
// matrix product per group: W_g [M_g × C_g·kh·kw] times the columns of
// every window side by side, so small patches still give a wide GEMM.
func (st *incStep) convPatch(p *incPlan, x *tensor.Tensor, c, ph, pw int) *tensor.Tensor {
	nb, ih, iw := x.Shape[0], x.Shape[2], x.Shape[3]
	g := st.g
	y := p.patchTensor(nb, st.m, ph, pw)
	pq := ph * pw
	mg := st.m / st.group
	if st.cg == 1 && st.group == c {
		// Depthwise: too little reuse for a matrix product.
		khw := g.kh * g.kw
		p.parallel(nb*st.m, func(i int) {
			b, m := i/st.m, i%st.m
			ch := m / mg
			src := x.F32[(b*c+ch)*ih*iw : (b*c+ch+1)*ih*iw]
			ker := st.w[m*khw : (m+1)*khw]
			dst := y.F32[i*pq : (i+1)*pq]
			var bias float32
			if st.b != nil {
				bias = st.b[m]
			}
			for oy := 0; oy < ph; oy++ {
				for ox := 0; ox < pw; ox++ {
					var acc float32
					for ki := 0; ki < g.kh; ki++ {
						row := src[(oy*g.sh+ki*g.dh)*iw+ox*g.sw:]
						kr := ker[ki*g.kw : (ki+1)*g.kw]
						for kj, kv := range kr {
							acc += row[kj*g.dw] * kv
						}
					}
					dst[oy*pw+ox] = acc + bias
				}
			}
		})
		return y
	}
	kk := st.cg * g.kh * g.kw
	n := nb * pq
	colb, tmpb := p.buf(kk*n), p.buf(mg*n)
	defer p.release(colb)
	defer p.release(tmpb)
	col, tmp := *colb, *tmpb
	for gi := 0; gi < st.group; gi++ {
		// col[r, b·pq + o] = x[b, gi·cg + ch, oy·sh + ki·dh, ox·sw + kj·dw]
		p.parallel(kk, func(r int) {
			ch, kidx := r/(g.kh*g.kw), r%(g.kh*g.kw)
			ki, kj := kidx/g.kw, kidx%g.kw
			dst := col[r*n : (r+1)*n]
			for b := 0; b < nb; b++ {
				plane := x.F32[(b*c+gi*st.cg+ch)*ih*iw:]
				d := dst[b*pq : (b+1)*pq]
				for oy := 0; oy < ph; oy++ {
					srow := plane[(oy*g.sh+ki*g.dh)*iw+kj*g.dw:]
					drow := d[oy*pw : (oy+1)*pw]
					if g.sw == 1 {
						src := srow[:len(drow)]
						if pw > 16 {
							copy(drow, src)
							continue
						}
						// Short rows: a loop beats a memmove call.
						for ox := range drow {
							drow[ox] = src[ox]
						}
						continue
					}
					for ox := range drow {
						drow[ox] = srow[ox*g.sw]
					}
				}
			}
		})
		st.gemm.Sgemm(false, false, mg, n, kk, 1, st.w[gi*mg*kk:(gi+1)*mg*kk], kk, col, n, 0, tmp, n)
		st.scatter(tmp, y.F32, gi, mg, nb, pq)
	}
	return y
}

// convCols multiplies the weights of a one-group convolution by ready
// columns [C·kh·kw, B·P·Q] into [B, M, P, Q].
func (st *incStep) convCols(p *incPlan, col []float32, nb, ph, pw int) *tensor.Tensor {
	pq := ph * pw
	n := nb * pq
	kk := len(st.w) / st.m
	y := p.patchTensor(nb, st.m, ph, pw)
	tmpb := p.buf(st.m * n)
	defer p.release(tmpb)
	st.gemm.Sgemm(false, false, st.m, n, kk, 1, st.w, kk, col[:kk*n], n, 0, *tmpb, n)
	st.scatter(*tmpb, y.F32, 0, st.m, nb, pq)
	return y
}

// scatter adds the bias to the product tmp [M_g, B·pq] of group gi and
// writes it to y [B, M, pq].
func (st *incStep) scatter(tmp, y []float32, gi, mg, nb, pq int) {
	n := nb * pq
	for m := 0; m < mg; m++ {
		var bias float32
		if st.b != nil {
			bias = st.b[gi*mg+m]
		}
		for b := 0; b < nb; b++ {
			src := tmp[m*n+b*pq : m*n+(b+1)*pq]
			dst := y[(b*st.m+gi*mg+m)*pq : (b*st.m+gi*mg+m+1)*pq]
			for i, v := range src {
				dst[i] = v + bias
			}
		}
	}
}

// parallel runs f(0..n-1) on the plan's team.
func (p *incPlan) parallel(n int, f func(i int)) {
	p.team.run([]int{n}, func(_, i int) error {
		f(i)
		return nil
	})
}

// propagate computes the geometry of every value for a batch of changed
// input rectangles without computing any data. An entry is nil for values
// the batch never reaches and for constants.
func (p *incPlan) propagate(rects []Rect) []*incGeo {
	xs := p.shapes[p.in]
	chg := make([]Rect, len(rects))
	for b, r := range rects {
		chg[b] = Rect{max(r.X0, 0), max(r.Y0, 0), min(r.X1, xs[3]), min(r.Y1, xs[2])}
	}
	geos := make([]*incGeo, len(p.g.names))
	g0 := incPlace(chg, xs[2], xs[3])
	geos[p.in] = &g0
	for k, nd := range p.g.nodes {
		st := &p.steps[k]
		ins := make([]*incGeo, len(nd.in))
		reached := false
		for i, v := range nd.in {
			if v >= 0 && st.spatial[i] {
				if geos[v] == nil {
					geos[v] = &incGeo{full: true}
				}
				ins[i] = geos[v]
				reached = true
			}
		}
		gm := incGeo{full: true}
		if reached && st.kind != incFull {
			gm = p.geometry(k, ins)
		}
		for _, v := range nd.out {
			if v >= 0 {
				c := gm
				geos[v] = &c
			}
		}
	}
	return geos
}

// MultiplyAdds counts the Conv, Gemm and MatMul multiply-adds of evaluating
// rects in batches of batch windows incrementally, and of evaluating them
// with full forward passes. Incremental counts include the positions a
// batch recomputes because its windows share a size (a patch, or for
// Convs on the panel path a box, see incBoxes).
func (inc *Incremental) MultiplyAdds(rects []Rect, batch int) (incremental, full int64) {
	p := inc.plan
	if batch <= 0 {
		batch = 1
	}
	var perImage int64
	for _, st := range p.steps {
		perImage += st.fullMACs
	}
	full = perImage * int64(len(rects))
	for s := 0; s < len(rects); s += batch {
		part := rects[s:min(s+batch, len(rects))]
		nb := int64(len(part))
		geos := p.propagate(part)
		for k, nd := range p.g.nodes {
			st := &p.steps[k]
			if st.fullMACs == 0 {
				continue
			}
			gm := geos[nd.out[0]]
			if gm.full || st.kind != incConv {
				incremental += st.fullMACs * nb
				continue
			}
			ys := p.shapes[nd.out[0]]
			perPos := st.fullMACs / int64(ys[2]*ys[3])
			if !st.panels() {
				incremental += perPos * int64(gm.p*gm.q) * nb
				continue
			}
			// The panel path multiplies each window's box, not its patch.
			for _, gr := range incBoxes(*gm, st.conv.gemm1.PanelWidth()) {
				incremental += perPos * int64(gr.h*gr.w*len(gr.wins))
			}
		}
	}
	return incremental, full
}
