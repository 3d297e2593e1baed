package engine

import (
	"context"
	"fmt"

	"heedmap/onnx"
	"heedmap/tensor"
)

// RunOptions selects what a forward pass retains beyond the graph outputs.
type RunOptions struct {
	// Keep names intermediate values to retain so Pass.Value returns them.
	Keep []string
	// Backward retains the forward values that Pass.Backward needs: for each
	// differentiable node that depends on a graph input, exactly the inputs
	// and outputs its Backward declared it reads.
	Backward bool
	// WholeBatch runs a batch as one pass even where Run would take it
	// image by image (split.go).
	WholeBatch bool
}

// Pass is the result of one forward run: the graph outputs, the kept values
// and, when run with Backward, what reverse mode needs. A Pass is not safe
// for concurrent use, but several Passes of one Graph may run concurrently.
type Pass struct {
	g        *Graph
	vals     []*tensor.Tensor // retained values (nil once freed)
	shapes   [][]int          // shape of every computed value, kept after freeing
	dtypes   []tensor.DType
	backward bool
	// bwdOnly[v]: v is retained only because Backward reads it (not a
	// graph output, not in RunOptions.Keep), so Release may recycle it.
	bwdOnly  []bool
	released bool

	peakLive int // largest number of simultaneously held activations
	// liveBytes and peakBytes measure the same in bytes of tensor data
	// (node outputs only; inputs and constants are not the plan's to free).
	// A view op's output that shares its input's data (Identity, Reshape)
	// is counted again, so these are upper bounds.
	liveBytes, peakBytes int64
	// producedBytes totals the node outputs the pass computed.
	producedBytes int64

	// parts holds one pass per image when Run took the batch image by
	// image (split.go); inputs are then the batch's inputs, and vals
	// caches the values joined from the parts.
	parts  []*Pass
	inputs map[string]*tensor.Tensor
	// pending is a pointwise product put off until the depthwise
	// convolution that reads it (fuse_pwdw.go), pendingDW a depthwise
	// convolution put off until the pointwise one that reads it
	// (fuse_dwpw.go); pairs counts the pairs computed together.
	pending   *pendingPW
	pendingDW *pendingDW
	pairs     int
	// bits[v] holds value v's gradient mask, one bit per value, in an
	// arena buffer, where the pass keeps that instead of v (bitmask.go).
	bits [][]float32
}

func dataBytes(t *tensor.Tensor) int64 {
	if t == nil {
		return 0
	}
	return 4*int64(len(t.F32)) + 8*int64(len(t.I64))
}

// Run executes the graph on inputs (keyed by graph input name). It checks
// every declared input shape (a symbolic dimension such as "batch" accepts
// any size, but the same symbol must have one size across inputs) and
// checks ctx between nodes. Values are dropped after their last use unless
// they are graph outputs, listed in opt.Keep or needed by Backward.
//
// A batch whose images the graph computes independently may be run image
// by image, where that keeps activations in cache (split.go); the Pass
// behaves the same either way.
func (g *Graph) Run(ctx context.Context, inputs map[string]*tensor.Tensor, opt RunOptions) (*Pass, error) {
	if err := g.checkInputs(inputs); err != nil {
		return nil, err
	}
	if n := g.splitBatch(inputs, opt); n > 1 {
		return g.runSplit(ctx, inputs, opt, n)
	}
	return g.run(ctx, inputs, opt)
}

// run is Run for one pass over the whole batch, on checked inputs.
func (g *Graph) run(ctx context.Context, inputs map[string]*tensor.Tensor, opt RunOptions) (*Pass, error) {
	keep := make([]bool, len(g.names))
	for _, name := range opt.Keep {
		v, ok := g.index[name]
		if !ok {
			return nil, fmt.Errorf("engine: Keep: graph has no value %q", name)
		}
		keep[v] = true
	}
	var bwdOnly []bool
	if opt.Backward {
		bwdOnly = make([]bool, len(g.names))
		for _, nd := range g.nodes {
			if !g.nodeVarying(nd) {
				continue
			}
			for i, v := range nd.in {
				if v >= 0 && nd.needIn[i] && !keep[v] && !g.isOutput[v] {
					bwdOnly[v] = true
				}
			}
			for i, v := range nd.out {
				if v >= 0 && nd.needOut[i] && !keep[v] && !g.isOutput[v] {
					bwdOnly[v] = true
				}
			}
		}
		for _, nd := range g.nodes {
			if !g.nodeVarying(nd) {
				continue
			}
			for i, v := range nd.in {
				if v >= 0 && nd.needIn[i] {
					keep[v] = true
				}
			}
			for i, v := range nd.out {
				if v >= 0 && nd.needOut[i] {
					keep[v] = true
				}
			}
		}
	}
	defer g.arena.passStart()()
	var reported int64 // p.peakBytes last told to the arena
	p := &Pass{
		g:        g,
		vals:     make([]*tensor.Tensor, len(g.names)),
		shapes:   make([][]int, len(g.names)),
		dtypes:   make([]tensor.DType, len(g.names)),
		backward: opt.Backward,
		bwdOnly:  bwdOnly,
	}
	set := func(v int, t *tensor.Tensor) {
		p.vals[v] = t
		p.shapes[v] = t.Shape
		if p.shapes[v] == nil { // a scalar; nil marks "not computed"
			p.shapes[v] = []int{}
		}
		p.dtypes[v] = t.DType
	}
	for v, c := range g.consts {
		if c != nil {
			set(v, c)
		}
	}
	for i, v := range g.inputIdx {
		set(v, inputs[g.inputs[i].Name])
	}
	live := 0
	in := make([]*tensor.Tensor, 0, 8)
	for k, nd := range g.nodes {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		in = in[:0]
		for _, v := range nd.in {
			if v < 0 {
				in = append(in, nil)
				continue
			}
			in = append(in, p.vals[v])
		}
		op := g.fusedOp(k, keep)
		in = fusedInputs(op, in, p.vals)
		out := p.deferPointwise(k, keep, in)
		if out == nil {
			out = p.deferDepthwise(k, op, keep, in)
		}
		var err error
		if out == nil {
			var done bool
			if out, done, err = p.runPending(k, op, in); !done {
				if out, done, err = p.runPendingDW(k, op, in); !done {
					out, err = safeForward(op, in)
				}
			}
		}
		if err != nil {
			return nil, fmt.Errorf("engine: %s: %w", nd.label(), err)
		}
		for i, v := range nd.out {
			if v < 0 {
				continue
			}
			if i >= len(out) || out[i] == nil {
				return nil, fmt.Errorf("engine: %s: output %d (%q) not produced", nd.label(), i, g.names[v])
			}
			set(v, out[i])
			live++
			p.liveBytes += dataBytes(out[i])
			p.producedBytes += dataBytes(out[i])
			if bwdOnly != nil && bwdOnly[v] && g.bitMask[v] && p.keepBits(v, nd) {
				keep[v] = false // Backward reads the bits; v is freed as usual
			}
		}
		// High-water mark while the node's inputs and outputs coexist.
		if p.liveBytes > p.peakBytes {
			p.peakBytes = p.liveBytes
		}
		// Tell the arena before this node's frees, so the first pass may
		// already recycle; only growth of a fifth or more is reported, to
		// keep the lock off the per-node path.
		if p.peakBytes > reported+reported/5 {
			reported = p.peakBytes
			g.arena.passPeak(reported)
		}
		// Free what this node was the last reader of, and outputs nobody reads.
		for _, v := range nd.in {
			if v >= 0 && g.lastUse[v] == k && g.producer[v] >= 0 && !keep[v] && !g.isOutput[v] && p.vals[v] != nil && !p.heldForPending(v) {
				p.liveBytes -= dataBytes(p.vals[v])
				g.recycle(p, v)
				p.vals[v] = nil
				live--
			}
		}
		if live > p.peakLive {
			p.peakLive = live
		}

		for _, v := range nd.out {
			if v >= 0 && g.lastUse[v] < 0 && !keep[v] && !g.isOutput[v] {
				p.liveBytes -= dataBytes(p.vals[v])
				g.recycle(p, v)
				p.vals[v] = nil
				live--
			}
		}
	}
	g.arena.passPeak(p.peakBytes)
	return p, nil
}

// Release hands the buffers of the values the pass retained only for
// Backward to the graph's arena, so the next pass reuses them instead of
// allocating: without it every forward+backward pass allocates afresh all
// it keeps (14 buffers, 18 MB for ResNet-18 at batch 1). Graph outputs,
// values named in RunOptions.Keep and inputs stay valid; Backward fails
// after Release. Call it once the pass's gradients are computed; a pass
// never released is left to the garbage collector as before. Release is
// idempotent and does nothing for a pass run without Backward.
func (p *Pass) Release() {
	if p.released {
		return
	}
	p.released = true
	for _, q := range p.parts {
		q.Release()
	}
	p.releaseBits()
	for v, only := range p.bwdOnly {
		if only && p.vals[v] != nil && p.g.producer[v] >= 0 {
			p.g.recycle(p, v)
			p.vals[v] = nil
		}
	}
}

// Recycle hands tensors the caller got from this graph (gradients from
// Backward, outputs from Run) back to its arena once the caller is done
// with them, so a later pass reuses their buffers: the input gradient of a
// forward+backward pass is otherwise fresh memory every pass. Measured on
// ResNet-18 at batch 1: 142 page faults a pass, the first layer's clear of
// its 600 KB input gradient took 1.8–2.2 ms of CPU time, and recycling it
// saved 0.1–0.9 ms a pass in a steady loop. The caller must not touch a
// recycled tensor again, nor
// recycle a tensor twice. Buffers of sizes the graph never asked for, or
// beyond the arena's bound, are left to the garbage collector.
func (g *Graph) Recycle(ts ...*tensor.Tensor) {
	for _, t := range ts {
		if t != nil && t.DType == tensor.Float32 {
			g.arena.put(t.F32)
		}
	}
}

// nodeVarying reports whether a node depends on a graph input (only such
// nodes are executed; folded ones are constants).
func (g *Graph) nodeVarying(nd *node) bool {
	for _, v := range nd.out {
		if v >= 0 && g.varying[v] {
			return true
		}
	}
	return false
}

// Value returns a graph output, a kept value, an input or a constant.
func (p *Pass) Value(name string) (*tensor.Tensor, bool) {
	v, ok := p.g.index[name]
	if ok && p.parts != nil {
		return p.joinedValue(v)
	}
	if !ok || p.vals[v] == nil {
		return nil, false
	}
	return p.vals[v], true
}

// Shape returns the shape a value had in this pass, even if it was freed.
func (p *Pass) Shape(name string) ([]int, bool) {
	v, ok := p.g.index[name]
	if ok && p.parts != nil {
		return p.joinedShape(v)
	}
	if !ok || p.shapes[v] == nil {
		return nil, false
	}
	return p.shapes[v], true
}

func (g *Graph) checkInputs(inputs map[string]*tensor.Tensor) error {
	sym := map[string]int{}
	symFrom := map[string]string{}
	for _, vi := range g.inputs {
		t, ok := inputs[vi.Name]
		if !ok || t == nil {
			return fmt.Errorf("engine: input %q not given", vi.Name)
		}
		if vi.DType != 0 && t.DType != vi.DType {
			return fmt.Errorf("engine: input %q is %s, model declares %s", vi.Name, t.DType, vi.DType)
		}
		if err := checkTensorData(t); err != nil {
			return fmt.Errorf("engine: input %q: %v", vi.Name, err)
		}
		if vi.Shape == nil {
			continue
		}
		if len(t.Shape) != len(vi.Shape) {
			return fmt.Errorf("engine: input %q has shape %v, model declares %s", vi.Name, t.Shape, fmtDims(vi.Shape))
		}
		for i, d := range vi.Shape {
			got := t.Shape[i]
			switch {
			case d.Param != "":
				if want, seen := sym[d.Param]; seen && want != got {
					return fmt.Errorf("engine: input %q dimension %d (%s) is %d, but %s gave %s=%d", vi.Name, i, d.Param, got, symFrom[d.Param], d.Param, want)
				}
				sym[d.Param], symFrom[d.Param] = got, fmt.Sprintf("input %q", vi.Name)
			case d.Value >= 0 && int64(got) != d.Value:
				return fmt.Errorf("engine: input %q has shape %v, model declares %s (dimension %d is %d, want %d)", vi.Name, t.Shape, fmtDims(vi.Shape), i, got, d.Value)
			}
		}
	}
	isInput := map[string]bool{}
	for _, vi := range g.inputs {
		isInput[vi.Name] = true
	}
	for name := range inputs {
		if isInput[name] {
			continue
		}
		if _, ok := g.index[name]; ok {
			// Overriding an initializer would leave the constants folded
			// from it at compile time stale.
			return fmt.Errorf("engine: %q is an initializer or intermediate value, not a graph input; it cannot be fed", name)
		}
		return fmt.Errorf("engine: graph has no input %q", name)
	}
	return nil
}

func checkTensorData(t *tensor.Tensor) error {
	n := tensor.Numel(t.Shape)
	for _, d := range t.Shape {
		if d < 0 {
			return fmt.Errorf("negative dimension in shape %v", t.Shape)
		}
	}
	switch t.DType {
	case tensor.Float32:
		if len(t.F32) != n {
			return fmt.Errorf("%d float32 values for shape %v", len(t.F32), t.Shape)
		}
	case tensor.Int64, tensor.Bool:
		if len(t.I64) != n {
			return fmt.Errorf("%d integer values for shape %v", len(t.I64), t.Shape)
		}
	default:
		return fmt.Errorf("unknown dtype %v", t.DType)
	}
	return nil
}

func fmtDims(ds []onnx.Dim) string {
	s := "["
	for i, d := range ds {
		if i > 0 {
			s += " "
		}
		switch {
		case d.Param != "":
			s += d.Param
		case d.Value < 0:
			s += "?"
		default:
			s += fmt.Sprint(d.Value)
		}
	}
	return s + "]"
}

// safeForward runs an operator, turning a panic (an operator bug on an
// input shape it failed to validate) into an error so one bad model or
// input cannot crash the caller.
func safeForward(op Op, in []*tensor.Tensor) (out []*tensor.Tensor, err error) {
	defer func() {
		if r := recover(); r != nil {
			out, err = nil, fmt.Errorf("operator panicked: %v", r)
		}
	}()
	return op.Forward(in)
}
