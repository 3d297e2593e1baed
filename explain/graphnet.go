package explain

import (
	"context"
	"fmt"
	"sync/atomic"

	"heedmap/engine"
	"heedmap/tensor"
)

// GraphOptions configures FromGraph.
type GraphOptions struct {
	// Input is the image input's name; "" = the graph's only
	// non-initializer input.
	Input string
	// Output is the logits output's name; "" = the graph's first output.
	// It may name an inner value: for a model whose graph ends in Softmax
	// (or Sigmoid), name the tensor that feeds it, so that the Logit score
	// and Grad-CAM's pre-softmax score mean what their definitions say and
	// the Softmax/Sigmoid score kinds are not applied twice.
	Output string
	// NHWC says the model takes channels-last input. The methods always work
	// in NCHW (Network's contract); the adapter transposes on the way in and
	// transposes gradients back.
	NHWC bool
	// ActivationBudget is the most activation data, in bytes, one pass may
	// hold when the methods choose their batch sizes (see BatchSizer); 0 =
	// DefaultActivationBudget.
	ActivationBudget int64
}

// DefaultActivationBudget bounds one pass's activations at 384 MiB (our
// choice). Measured per image at 224² for a gradient: ResNet-18 8.9 MiB and
// MobileNetV2 24 MiB keep the default batch of 16; DenseNet-121 and
// EfficientNet-B0 (64 MiB) run 6 at a time, ConvNeXt-Tiny (128 MiB) 3 and
// ViT-B/16 (192 MiB) 2, where batches of 16 would hold 1–3 GB.
const DefaultActivationBudget = 384 << 20

// graphNet adapts a compiled ONNX graph to Network.
type graphNet struct {
	g             *engine.Graph
	input, output string
	shape         []int // NCHW, -1 for dynamic
	nhwc          bool
	keep          []string // the output, when it is an inner value
	budget        int64
	// perImage holds the most activation bytes per image measured so far
	// in a forward-only pass [0] and in a pass run for a gradient [1].
	perImage [2]atomic.Int64
}

// MaxBatch implements BatchSizer from the passes measured so far.
func (n *graphNet) MaxBatch(backward bool) int {
	k := 0
	if backward {
		k = 1
	}
	per := n.perImage[k].Load()
	if per <= 0 {
		return 0
	}
	return int(max(1, n.budget/per))
}

// measured records a pass's activation bytes per image.
func (n *graphNet) measured(p *engine.Pass, batch int, backward bool) {
	k := 0
	if backward {
		k = 1
	}
	per := (p.PeakBytes() + int64(batch) - 1) / int64(max(batch, 1))
	for {
		old := n.perImage[k].Load()
		if per <= old || n.perImage[k].CompareAndSwap(old, per) {
			return
		}
	}
}

// FromGraph wraps a compiled graph as a Network. The output must hold one
// row of logits per image (any shape whose leading dimension is the batch).
func FromGraph(g *engine.Graph, opts GraphOptions) (Network, error) {
	ins, outs := g.Inputs(), g.Outputs()
	n := &graphNet{g: g, input: opts.Input, output: opts.Output, nhwc: opts.NHWC, budget: opts.ActivationBudget}
	if n.budget <= 0 {
		n.budget = DefaultActivationBudget
	}
	if n.input == "" {
		if len(ins) != 1 {
			return nil, fmt.Errorf("explain: the model has %d inputs; name the image input", len(ins))
		}
		n.input = ins[0].Name
	}
	found := false
	for _, vi := range ins {
		if vi.Name != n.input {
			continue
		}
		found = true
		if len(vi.Shape) != 4 {
			return nil, fmt.Errorf("explain: model input %q has rank %d, want a 4-D image batch", vi.Name, len(vi.Shape))
		}
		for _, d := range vi.Shape {
			v := int(d.Value)
			if v <= 0 {
				v = -1
			}
			n.shape = append(n.shape, v)
		}
	}
	if !found {
		return nil, fmt.Errorf("explain: the model has no input %q", n.input)
	}
	if n.nhwc {
		n.shape = []int{n.shape[0], n.shape[3], n.shape[1], n.shape[2]}
	}
	if n.output == "" {
		if len(outs) == 0 {
			return nil, fmt.Errorf("explain: the model has no outputs")
		}
		n.output = outs[0].Name
	}
	inner := true
	for _, vi := range outs {
		if vi.Name == n.output {
			inner = false
		}
	}
	if inner {
		n.keep = []string{n.output}
	}
	return n, nil
}

func (n *graphNet) InputShape() []int { return append([]int(nil), n.shape...) }

// GradCAMLayer implements LayerChooser through the runtime.
func (n *graphNet) GradCAMLayer() (string, error) { return n.g.GradCAMLayer() }

func (n *graphNet) feed(x *tensor.Tensor) (map[string]*tensor.Tensor, error) {
	if len(x.Shape) != 4 {
		return nil, fmt.Errorf("explain: input %v is not NCHW", x)
	}
	if !n.nhwc {
		return map[string]*tensor.Tensor{n.input: x}, nil
	}
	return map[string]*tensor.Tensor{n.input: permute(x, [4]int{0, 2, 3, 1})}, nil
}

// logits reshapes the output value to [N, K].
func (n *graphNet) logits(p *engine.Pass, batch int) (*tensor.Tensor, []int, error) {
	v, ok := p.Value(n.output)
	if !ok {
		return nil, nil, fmt.Errorf("explain: the model produced no output %q", n.output)
	}
	if v.DType != tensor.Float32 || len(v.Shape) == 0 || v.Shape[0] != batch || v.Len() == 0 {
		return nil, nil, fmt.Errorf("explain: output %q is %v, want float logits [%d, K]", n.output, v, batch)
	}
	return tensor.FromFloat32(v.F32, batch, v.Len()/batch), v.Shape, nil
}

func (n *graphNet) Forward(ctx context.Context, x *tensor.Tensor) (*tensor.Tensor, error) {
	in, err := n.feed(x)
	if err != nil {
		return nil, err
	}
	p, err := n.g.Run(ctx, in, engine.RunOptions{Keep: n.keep})
	if err != nil {
		return nil, err
	}
	n.measured(p, x.Shape[0], false)
	l, _, err := n.logits(p, x.Shape[0])
	return l, err
}

func (n *graphNet) Gradient(ctx context.Context, x *tensor.Tensor, seed func(*tensor.Tensor) (*tensor.Tensor, error), layer string) (*Gradients, error) {
	in, err := n.feed(x)
	if err != nil {
		return nil, err
	}
	opt := engine.RunOptions{Backward: true, Keep: n.keep}
	wrt := []string{n.input}
	if layer != "" {
		opt.Keep = append(append([]string(nil), n.keep...), layer)
		wrt = append(wrt, layer)
	}
	p, err := n.g.Run(ctx, in, opt)
	if err != nil {
		return nil, err
	}
	n.measured(p, x.Shape[0], true)
	// The values kept for Backward go back to the graph's arena once the
	// gradients are out; the logits and the kept layer stay valid.
	defer p.Release()
	l, outShape, err := n.logits(p, x.Shape[0])
	if err != nil {
		return nil, err
	}
	s, err := seed(l)
	if err != nil {
		return nil, err
	}
	if s.Len() != l.Len() {
		return nil, fmt.Errorf("explain: seed %v for logits %v", s, l)
	}
	seedT := tensor.FromFloat32(s.F32, outShape...)
	gr, err := p.Backward(ctx, map[string]*tensor.Tensor{n.output: seedT}, wrt)
	if err != nil {
		return nil, err
	}
	gi, ok := gr[n.input]
	if !ok {
		return nil, fmt.Errorf("explain: no gradient for input %q", n.input)
	}
	if n.nhwc {
		gi = permute(gi, [4]int{0, 3, 1, 2})
	}
	out := &Gradients{Logits: l, Input: gi}
	if layer != "" {
		a, ok := p.Value(layer)
		if !ok {
			return nil, fmt.Errorf("explain: the model has no value %q to explain at", layer)
		}
		out.Layer, out.LayerGrad = a, gr[layer]
		if out.LayerGrad == nil {
			return nil, fmt.Errorf("explain: no gradient for layer %q", layer)
		}
	}
	return out, nil
}

// recycle implements gradientRecycler: the gradients' buffers go back to
// the graph's arena (the logits and the layer activation stay with the
// garbage collector: the logits may be a view of a kept buffer).
func (n *graphNet) recycle(g *Gradients) {
	n.g.Recycle(g.Input, g.LayerGrad)
}

// permute returns a 4-D tensor with axes reordered: out axis i is in axis
// perm[i].
func permute(t *tensor.Tensor, perm [4]int) *tensor.Tensor {
	var shape [4]int
	for i, p := range perm {
		shape[i] = t.Shape[p]
	}
	out := tensor.New(shape[:]...)
	var stride [4]int
	stride[3] = 1
	for i := 2; i >= 0; i-- {
		stride[i] = stride[i+1] * t.Shape[i+1]
	}
	i := 0
	for a := 0; a < shape[0]; a++ {
		for b := 0; b < shape[1]; b++ {
			for c := 0; c < shape[2]; c++ {
				base := a*stride[perm[0]] + b*stride[perm[1]] + c*stride[perm[2]]
				for d := 0; d < shape[3]; d++ {
					out.F32[i] = t.F32[base+d*stride[perm[3]]]
					i++
				}
			}
		}
	}
	return out
}
