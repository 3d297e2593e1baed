package engine

import (
	"context"
	"fmt"
	"runtime"
	"strings"
	"sync"
	"sync/atomic"

	"heedmap/tensor"
)

// Running a batch image by image.
//
// A batched pass computes each layer for every image before the next
// layer starts, so a layer's output for the whole batch goes to memory and
// comes back. Batching pays where a layer's weights outweigh its
// activations (the weights are read once for all images); it costs where
// the activations are larger, because one image's activations would have
// stayed in the core's cache from one layer to the next. Measured with
// full-size MobileNetV2 (14 MB of weights, 26 MB of activations produced
// per image) on a 2-core Xeon with 2 MB of L2 per core, steady loop,
// ms per image: forward 4.5 at batch 1, 4.2–4.5 at batch 2, 4.9 at 4, 5.8–5.9
// at 8 and 6.0–6.1 at 16; forward+backward 10.6–10.8 at batch 1 and 13.5 at
// 16. Full-size ResNet-18 (47 MB of weights, 16 MB of activations per
// image) goes the other way: 11.8–12.2 ms at batch 1, 10.8–11.4 at 8 and 16.
//
// So when every operator of a graph computes each image on its own (a
// graph that is "image-wise", imageWise) and one image's activations
// outweigh the graph's constants and a floor (splitFloorBytes), Run runs a
// batch as one pass per image and the Pass it returns joins them: Value
// concatenates, Backward splits the seeds and joins the gradients. The rule depends only on the graph
// and the per-image input shape, never on timing, so a batch's results do
// not change from one call to the next. RunOptions.WholeBatch turns it off.
// With more than one core the images run in lanes, one per core at a time
// (eachImage): on the 2-vCPU AMD EPYC the whole batch as one pass had
// become faster than one image at a time on both cores (MobileNetV2
// forward at batch 16: 3.8–4.4 against 4.3–5.1 ms per image), and lanes
// are faster than both (3.6–3.8 ms).

// splitFloorBytes is the fewest bytes one image's pass must produce for
// Run to take a batch image by image. Below it a layer's data for the
// whole batch stays near the cores anyway, and per-operator costs, paid
// once per image instead of once per batch, dominate: the demo's shortcut
// model (0.19 MB of constants, 1.0 MB produced per 64×64 image) took 4.6
// ms per batch of 16 forward image by image against 3.3 ms as one pass,
// and 10.6 against 8.4 ms forward+backward. Full-size MobileNetV2 produces
// 26 MB per 224² image.
const splitFloorBytes = 4 << 20

// imageWiseOps are the operator types that treat the leading axis of their
// first input as the batch and compute each image on its own, provided
// every other input is a graph constant without a batch axis (checked by
// imageWiseNode).
var imageWiseOps = map[string]bool{
	"Conv": true, "ConvTranspose": true, "BatchNormalization": true,
	"Relu": true, "LeakyRelu": true, "PRelu": true, "Clip": true, "Sigmoid": true,
	"Tanh": true, "HardSigmoid": true, "HardSwish": true, "Elu": true, "Selu": true,
	"Softplus": true, "Softsign": true, "Erf": true, "Exp": true, "Log": true,
	"Neg": true, "Abs": true, "Sqrt": true, "Reciprocal": true,
	"Identity": true, "Dropout": true,
	"MaxPool": true, "AveragePool": true, "GlobalAveragePool": true, "GlobalMaxPool": true,
	"LRN": true, "Pad": true,
	// Elementwise binaries: both inputs may depend on the images.
	"Add": true, "Sub": true, "Mul": true, "Div": true, "Max": true, "Min": true, "Pow": true,
	// Axis- or matrix-shaped ops, checked further in imageWiseNode.
	"Concat": true, "Flatten": true, "Gemm": true, "MatMul": true, "Softmax": true, "LogSoftmax": true,
}

// imageWiseNode reports whether nd computes each image of a batch on its
// own, given that its inputs that depend on the graph inputs carry the
// batch on their leading axis (and its outputs then do too). How constant
// operands broadcast needs shapes: broadcastsPerImage checks that on a
// pass.
func (g *Graph) imageWiseNode(nd *node, opset int64) bool {
	op := nd.src.OpType
	if !imageWiseOps[op] || nd.src.Domain != "" && nd.src.Domain != "ai.onnx" {
		return false
	}
	varying := func(i int) bool { return i < len(nd.in) && nd.in[i] >= 0 && g.varying[nd.in[i]] }
	for _, v := range nd.in {
		if v >= 0 && !g.varying[v] && g.consts[v] == nil {
			return false
		}
	}
	switch op {
	case "MaxPool": // its optional indices count positions across the whole batch
		return len(nd.out) < 2 || nd.out[1] < 0
	case "Concat":
		a := nd.src.Int("axis", 0)
		return a >= 1 || a == -1
	case "Flatten": // axis 2 would fold the batch into the first axis
		return nd.src.Int("axis", 1) == 1
	case "Softmax", "LogSoftmax":
		def := int64(1)
		if opset >= 13 {
			def = -1
		}
		a := nd.src.Int("axis", def)
		return a >= 1 || a == -1
	case "Gemm": // a C with a row per image of the exported batch would not broadcast per image
		if len(nd.in) > 2 && nd.in[2] >= 0 {
			if c := g.consts[nd.in[2]]; c != nil && len(c.Shape) == 2 && c.Shape[0] != 1 {
				return false
			}
		}
		return nd.src.Int("transA", 0) == 0 && varying(0) && !varying(1) && !varying(2)
	case "MatMul": // a B of rank 3 or more would broadcast over the batch
		return varying(0) && !varying(1) && len(g.consts[nd.in[1]].Shape) <= 2
	case "Pad":
		// Pads given as a constant input (opset ≥ 11) must leave the batch
		// axis alone; the attribute form is checked the same way.
		pads := nd.src.Ints("pads")
		if len(nd.in) > 1 && nd.in[1] >= 0 {
			c := g.consts[nd.in[1]]
			if c == nil || c.DType != tensor.Int64 {
				return false
			}
			pads = c.I64
		}
		if len(pads) < 2 || pads[0] != 0 || pads[len(pads)/2] != 0 {
			return false
		}
		return len(nd.in) < 4 || nd.in[3] < 0 // no axes input
	}
	return true
}

// planImageWise decides at compile time whether the graph is image-wise:
// every graph input is float and every executed node passes
// imageWiseNode. It also totals the bytes of the graph's constants.
func (g *Graph) planImageWise(opset int64) {
	for _, c := range g.consts {
		g.constBytes += dataBytes(c)
	}
	for _, vi := range g.inputs {
		if vi.DType != 0 && vi.DType != tensor.Float32 {
			return
		}
	}
	for _, nd := range g.nodes {
		if g.nodeVarying(nd) && !g.imageWiseNode(nd, opset) {
			return
		}
	}
	g.imageWise = true
}

// splitBatch returns the batch size n > 1 when Run may take the inputs
// image by image, else 0.
func (g *Graph) splitBatch(inputs map[string]*tensor.Tensor, opt RunOptions) int {
	if !g.imageWise || opt.WholeBatch {
		return 0
	}
	n := 0
	for _, vi := range g.inputs {
		t := inputs[vi.Name]
		if t.DType != tensor.Float32 || len(t.Shape) == 0 {
			return 0
		}
		if n == 0 {
			n = t.Shape[0]
		}
		if t.Shape[0] != n {
			return 0
		}
	}
	if n < 2 {
		return 0
	}
	return n
}

// imageKey names the per-image input shapes, the key of Graph.splitPlans.
func (g *Graph) imageKey(inputs map[string]*tensor.Tensor) string {
	var b strings.Builder
	for _, vi := range g.inputs {
		fmt.Fprint(&b, inputs[vi.Name].Shape[1:], ";")
	}
	return b.String()
}

// imageInputs returns views of images i0 … i1−1 of the inputs.
func (g *Graph) imageInputs(inputs map[string]*tensor.Tensor, i0, i1 int) map[string]*tensor.Tensor {
	sub := make(map[string]*tensor.Tensor, len(inputs))
	for name, t := range inputs {
		per := len(t.F32) / t.Shape[0]
		sub[name] = tensor.FromFloat32(t.F32[i0*per:i1*per], append([]int{i1 - i0}, t.Shape[1:]...)...)
	}
	return sub
}

// broadcastsPerImage reports whether, in pass p (one image), every value
// that depends on the graph inputs has a batch axis of 1 and a further
// axis, and no constant operand of an elementwise operator reaches the
// batch axis: its rank is below the output's, or its leading dimension is
// 1.
func (g *Graph) broadcastsPerImage(p *Pass) bool {
	for v, s := range p.shapes {
		if s != nil && g.varying[v] && (len(s) < 2 || s[0] != 1) {
			return false
		}
	}
	for _, nd := range g.nodes {
		if !g.nodeVarying(nd) || !elementwiseOps[nd.src.OpType] || len(nd.out) == 0 || nd.out[0] < 0 {
			continue
		}
		rank := len(p.shapes[nd.out[0]])
		for _, v := range nd.in {
			if c := g.consts[v]; v >= 0 && !g.varying[v] && c != nil && len(c.Shape) == rank && c.Shape[0] != 1 {
				return false
			}
		}
	}
	return true
}

var elementwiseOps = map[string]bool{"Add": true, "Sub": true, "Mul": true, "Div": true, "Max": true, "Min": true, "Pow": true, "PRelu": true}

// runSplit runs a batch of n images image by image when the graph allows
// it and one image's activations outweigh the graph's constants and
// splitFloor, else as one pass. Both are decided once per per-image input shape, on a pass of
// the batch's first image, which is kept as that image's part when the
// batch is split and dropped otherwise.
func (g *Graph) runSplit(ctx context.Context, inputs map[string]*tensor.Tensor, opt RunOptions, n int) (*Pass, error) {
	key := g.imageKey(inputs)
	var first *Pass
	split, known := g.splitPlans.Load(key)
	if !known {
		p, err := g.run(ctx, g.imageInputs(inputs, 0, 1), opt)
		if err != nil {
			return nil, err
		}
		per := p.producedBytes
		split, _ = g.splitPlans.LoadOrStore(key, g.broadcastsPerImage(p) && per > g.constBytes && per >= g.splitFloor)
		first = p
	}
	if !split.(bool) {
		if first != nil {
			first.Release()
		}
		return g.run(ctx, inputs, opt)
	}
	parts := make([]*Pass, n)
	from := 0
	if first != nil {
		parts[0], from = first, 1
	}
	err := g.eachImage(from, n, false, func(i int) error {
		p, err := g.run(ctx, g.imageInputs(inputs, i, i+1), opt)
		parts[i] = p
		return err
	})
	if err != nil {
		for _, q := range parts {
			if q != nil {
				q.Release()
			}
		}
		return nil, err
	}
	j := &Pass{g: g, parts: parts, inputs: inputs, vals: make([]*tensor.Tensor, len(g.names)), backward: opt.Backward}
	// The sum of the parts' peaks: with Backward every part keeps what it
	// reads until then; without, only one part's values per lane live at a time,
	// but callers size their batches by PeakBytes per image (and the
	// batch's inputs and outputs do scale with it), so it reads as the
	// whole batch would.
	for _, q := range parts {
		j.peakBytes += q.peakBytes
	}
	return j, nil
}

// eachImage runs f(i) for every image i in [from, n) of a batch taken
// image by image, from the last when backward is set. With more than one
// core it runs lanes: one goroutine per core, each claiming the next image
// and running its pass with the team's tasks on that goroutine alone
// (team.solo), so the cores work on different images and never wait for
// each other at a phase barrier. Which goroutine runs an image, and which
// runs a task, changes no result: the tasks and their arithmetic depend on
// the shapes and GOMAXPROCS only, so each image is bit for bit its pass
// alone. Lanes run when the images outnumber the cores or match them.
// Measured on the 2-vCPU AMD EPYC with full-size MobileNetV2
// forward at batch 16: two single-core processes side by side ran 5.2–7.1
// ms per image each (about 3 ms per image together), against 4.4–4.9 ms
// for one pass at a time on both cores (most of the difference is the
// barrier waits of a shared machine, 0.16–0.65 ms a pass) and 3.8–4.3 ms
// for the whole batch as one pass. It returns the error of the lowest
// failing image, after which no image starts.
func (g *Graph) eachImage(from, n int, backward bool, f func(i int) error) error {
	index := func(k int) int {
		if backward {
			return from + n - 1 - k
		}
		return k
	}
	// With fewer images than cores, lanes would leave cores idle that the
	// team can use on one image at a time.
	lanes := runtime.GOMAXPROCS(0)
	if lanes <= 1 || n-from < lanes || g.team == nil {
		for k := from; k < n; k++ {
			if err := f(index(k)); err != nil {
				return fmt.Errorf("image %d of the batch: %w", index(k), err)
			}
		}
		return nil
	}
	g.team.solo.Add(1)
	defer g.team.solo.Add(-1)
	errs := make([]error, n)
	var next atomic.Int64
	next.Store(int64(from))
	var failed atomic.Bool
	lane := func() {
		for !failed.Load() {
			k := int(next.Add(1) - 1)
			if k >= n {
				return
			}
			i := index(k)
			if errs[i] = f(i); errs[i] != nil {
				failed.Store(true)
			}
		}
	}
	var wg sync.WaitGroup
	for range lanes - 1 {
		wg.Go(lane)
	}
	lane()
	wg.Wait()
	for i, err := range errs {
		if err != nil {
			return fmt.Errorf("image %d of the batch: %w", i, err)
		}
	}
	return nil
}

// joinedValue is Value for a pass run image by image: a graph input as
// given, a constant as is, and anything else joined from the parts along
// the batch axis (once; the joined tensor is kept).
func (p *Pass) joinedValue(v int) (*tensor.Tensor, bool) {
	if t := p.vals[v]; t != nil {
		return t, true
	}
	for i, iv := range p.g.inputIdx {
		if iv == v {
			return p.inputs[p.g.inputs[i].Name], true
		}
	}
	if c := p.g.consts[v]; c != nil {
		return c, true
	}
	ts := make([]*tensor.Tensor, len(p.parts))
	for i, q := range p.parts {
		if ts[i] = q.vals[v]; ts[i] == nil {
			return nil, false
		}
	}
	t := joinImages(ts)
	if t == nil {
		return nil, false
	}
	p.vals[v] = t
	return t, true
}

// joinedShape is Shape for a pass run image by image.
func (p *Pass) joinedShape(v int) ([]int, bool) {
	s := p.parts[0].shapes[v]
	if s == nil {
		return nil, false
	}
	if p.g.producer[v] < 0 && !p.g.varying[v] {
		return s, true // a constant
	}
	return append([]int{len(p.parts) * s[0]}, s[1:]...), true
}

// joinImages concatenates single-image tensors along the batch axis, or
// returns nil for scalars, which have none.
func joinImages(ts []*tensor.Tensor) *tensor.Tensor {
	s := ts[0].Shape
	if len(s) == 0 {
		return nil
	}
	out := &tensor.Tensor{DType: ts[0].DType, Shape: append([]int{len(ts) * s[0]}, s[1:]...)}
	if out.DType == tensor.Float32 {
		out.F32 = make([]float32, 0, len(ts)*len(ts[0].F32))
		for _, t := range ts {
			out.F32 = append(out.F32, t.F32...)
		}
	} else {
		out.I64 = make([]int64, 0, len(ts)*len(ts[0].I64))
		for _, t := range ts {
			out.I64 = append(out.I64, t.I64...)
		}
	}
	return out
}

// splitBackward is Backward for a pass run image by image: each part's
// Backward gets its image's rows of the seeds, and the gradients are
// joined along the batch axis.
func (p *Pass) splitBackward(ctx context.Context, seeds map[string]*tensor.Tensor, wrt []string) (map[string]*tensor.Tensor, error) {
	n := len(p.parts)
	for name, s := range seeds {
		if s == nil || s.DType != tensor.Float32 || len(s.Shape) == 0 || s.Shape[0] != n {
			return nil, fmt.Errorf("engine: Backward: seed %q must be a float tensor whose leading axis is the batch of %d", name, n)
		}
	}
	grads := make([]map[string]*tensor.Tensor, n)
	// The last images first: their forward values are the likeliest to be
	// in cache still.
	err := p.g.eachImage(0, n, true, func(i int) error {
		q := p.parts[i]
		sub := make(map[string]*tensor.Tensor, len(seeds))
		for name, s := range seeds {
			per := len(s.F32) / n
			sub[name] = tensor.FromFloat32(s.F32[i*per:(i+1)*per], append([]int{1}, s.Shape[1:]...)...)
		}
		g, err := q.Backward(ctx, sub, wrt)
		grads[i] = g
		return err
	})
	if err != nil {
		return nil, err
	}
	out := make(map[string]*tensor.Tensor, len(wrt))
	for _, name := range wrt {
		ts := make([]*tensor.Tensor, n)
		for i := range grads {
			ts[i] = grads[i][name]
		}
		if ts[0] == nil {
			continue
		}
		if v := p.g.index[name]; !p.g.varying[v] {
			// Not computed from the images: its (zero) gradient has no
			// batch axis to join along.
			out[name] = ts[0]
			continue
		}
		shape := append([]int{n * ts[0].Shape[0]}, ts[0].Shape[1:]...)
		t := p.g.arena.tensor(shape...)
		per := len(ts[0].F32)
		for i, gi := range ts {
			copy(t.F32[i*per:(i+1)*per], gi.F32)
			p.g.Recycle(gi)
		}
		out[name] = t
	}
	return out, nil
}
