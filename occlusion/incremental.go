package occlusion

import (
	"context"
	"fmt"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/tensor"
)

// Incremental scores windows by exact incremental inference (Nakandala,
// Kumar & Papakonstantinou, "Incremental and Approximate Inference for
// Faster Occlusion-based Deep CNN Explanations", SIGMOD 2019; see
// engine.Incremental): the unoccluded image is run once with every
// activation kept, and each batch of windows recomputes, layer by layer,
// only the region its windows can reach, switching to full recomputation
// where that region covers the map. Scores equal FullForward's up to float
// summation order. Networks not backed by a compiled graph (FromGraph),
// taking channels-last input, with more than one input or with a fixed
// batch size are scored by FullForward, and so are networks where the plan
// saves too little (MinSaving). It is the default evaluator: exact on every
// test, and with MinSaving not slower on any network measured
// (DEVELOPERS.md).
type Incremental struct {
	// BatchSize is the number of windows evaluated together; 0 = 16.
	BatchSize int
	// MinSaving is the least ratio of full-pass to incremental
	// multiply-adds (counted from the plan before any work) for which the
	// incremental path is used; below it FullForward is faster, because
	// the part of the graph the incremental path recomputes in full runs
	// without the runtime's buffer reuse and operator fusion. 0 = 1.25;
	// negative = always incremental. Squeeze-and-excitation networks
	// (EfficientNet-B0: 1.04×) fall below it: every SE block rescales
	// whole maps by a global average, so patches end at the first one.
	MinSaving float64
	// Log receives, once per call, the nodes recomputed in full because
	// they have no patch form and the path chosen; nil discards them.
	Log func(msg string)
}

func (e Incremental) Scores(ctx context.Context, net explain.Network, x, fill *tensor.Tensor, windows []Window, target explain.Target) ([]float64, error) {
	g, input, output, ok := explain.GraphOf(net)
	if !ok || len(g.Inputs()) != 1 {
		return FullForward{BatchSize: e.BatchSize}.Scores(ctx, net, x, fill, windows, target)
	}
	if n := net.InputShape()[0]; n > 0 {
		// A fixed batch size: the batch dimension cannot change.
		return FullForward{BatchSize: e.BatchSize}.Scores(ctx, net, x, fill, windows, target)
	}
	inc, err := engine.NewIncremental(ctx, g, input, output, x)
	if err != nil {
		return nil, fmt.Errorf("occlusion: %w", err)
	}
	if e.Log != nil {
		for _, f := range inc.Fallbacks() {
			e.Log("occlusion: incremental: recomputed in full from " + f)
		}
	}
	bs := e.BatchSize
	if bs <= 0 {
		bs = 16
	}
	rects := make([]engine.Rect, len(windows))
	for i, w := range windows {
		rects[i] = engine.Rect{X0: w.X, Y0: w.Y, X1: w.X + w.W, Y1: w.Y + w.H}
	}
	// Batches of windows with equal patch sizes (border windows together)
	// pad fewer patches; scores are written back in window order.
	order := inc.Order(rects)
	sorted := make([]engine.Rect, len(rects))
	for i, j := range order {
		sorted[i] = rects[j]
	}
	incMACs, fullMACs := inc.MultiplyAdds(sorted, bs)
	saving := float64(fullMACs) / float64(max(incMACs, 1))
	minSaving := e.MinSaving
	if minSaving == 0 {
		minSaving = 1.25
	}
	if saving < minSaving {
		if e.Log != nil {
			e.Log(fmt.Sprintf("occlusion: incremental inference would save only %.2f× of the multiply-adds; using full forward passes", saving))
		}
		return FullForward{BatchSize: e.BatchSize}.Scores(ctx, net, x, fill, windows, target)
	}
	if e.Log != nil {
		e.Log(fmt.Sprintf("occlusion: incremental inference: %.2f× fewer multiply-adds than full passes", saving))
	}
	out := make([]float64, len(windows))
	part := make([]engine.Rect, 0, bs)
	for s := 0; s < len(order); s += bs {
		idx := order[s:min(s+bs, len(order))]
		part = append(part[:0], sorted[s:s+len(idx)]...)
		y, err := inc.Occlude(ctx, fill, part)
		if err != nil {
			return nil, fmt.Errorf("occlusion: %w", err)
		}
		if y.Len() == 0 || y.Len()%len(part) != 0 {
			return nil, fmt.Errorf("occlusion: output %v for %d windows", y.Shape, len(part))
		}
		sc, err := target.Scores(tensor.FromFloat32(y.F32, len(part), y.Len()/len(part)))
		if err != nil {
			return nil, err
		}
		if len(sc) < len(part) {
			return nil, fmt.Errorf("occlusion: %d scores for %d windows", len(sc), len(part))
		}
		for j, i := range idx {
			out[i] = sc[j]
		}
	}
	return out, nil
}
