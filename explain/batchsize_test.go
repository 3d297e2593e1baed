package explain_test

import (
	"context"
	"os"
	"path/filepath"
	"slices"
	"testing"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/explain/explaintest"
	"heedmap/onnx"
	"heedmap/tensor"
)

// sizedLinear is a linear network that says how many images fit a pass
// once it has run one, and records the batch of every pass.
type sizedLinear struct {
	*explaintest.Linear
	max     int
	ran     bool
	batches []int
}

func (n *sizedLinear) MaxBatch(bool) int {
	if !n.ran {
		return 0
	}
	return n.max
}

func (n *sizedLinear) Forward(ctx context.Context, x *tensor.Tensor) (*tensor.Tensor, error) {
	n.ran = true
	n.batches = append(n.batches, x.Shape[0])
	return n.Linear.Forward(ctx, x)
}

func (n *sizedLinear) Gradient(ctx context.Context, x *tensor.Tensor, seed func(*tensor.Tensor) (*tensor.Tensor, error), layer string) (*explain.Gradients, error) {
	n.ran = true
	n.batches = append(n.batches, x.Shape[0])
	return n.Linear.Gradient(ctx, x, seed, layer)
}

// A network that sizes its batches gets one image first, then batches of
// at most its MaxBatch, and the attribution is the one the unsized network
// gives, bit for bit.
func TestBatchesFollowBatchSizer(t *testing.T) {
	ctx := context.Background()
	base := explaintest.NewLinear(2, 5, 4, 3, 11)
	x := tensor.New(1, 2, 5, 4)
	for i := range x.F32 {
		x.F32[i] = float32(i%7)/7 - 0.3
	}
	tg := explain.Class(1, explain.Logit)
	ig := explain.IntegratedGradients{Steps: 23, BatchSize: 8}
	want, err := ig.Attribute(ctx, base, x, tg)
	if err != nil {
		t.Fatal(err)
	}
	sized := &sizedLinear{Linear: base, max: 5}
	got, err := ig.Attribute(ctx, sized, x, tg)
	if err != nil {
		t.Fatal(err)
	}
	// Attribute runs the image alone first; then the steps: a probe of one,
	// then batches of at most 5.
	var steps []int
	total := 0
	for i := len(sized.batches) - 1; i >= 0 && total < 23; i-- {
		steps = append([]int{sized.batches[i]}, steps...)
		total += sized.batches[i]
	}
	if total != 23 || slices.Max(steps) > 5 {
		t.Errorf("step batches %v (all passes %v): want at most 5 images each, 23 in all", steps, sized.batches)
	}
	if !slices.Equal(got.Map.Data, want.Map.Data) {
		t.Errorf("attribution with sized batches differs from the unsized network's")
	}
	// A network that never measures itself keeps the requested batch after
	// the one-image probe.
	sized = &sizedLinear{Linear: base, max: 0}
	if _, err := ig.Attribute(ctx, sized, x, tg); err != nil {
		t.Fatal(err)
	}
	if n := len(sized.batches); n < 2 || sized.batches[n-1] != 23-1-8*2 || sized.batches[n-2] != 8 {
		t.Errorf("unmeasured network: batches %v, want a probe of 1, then 8, 8, 6", sized.batches)
	}
}

// The runtime adapter measures each pass's activation bytes per image and
// caps batches to its budget; a budget of one image's bytes gives batches
// of one and the same integrated-gradients map as the default budget.
func TestGraphNetBudget(t *testing.T) {
	dir := "../testdata/nets/resnet18"
	g, err := engine.Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		if _, serr := os.Stat(dir); serr != nil {
			t.Skip("no testdata/nets/resnet18")
		}
		t.Fatal(err)
	}
	x, _, err := onnx.LoadTensor(filepath.Join(dir, "input.pb"))
	if err != nil {
		t.Fatal(err)
	}
	x0 := tensor.FromFloat32(x.F32[:x.Len()/x.Shape[0]], append([]int{1}, x.Shape[1:]...)...)
	ctx := context.Background()
	tg := explain.Class(0, explain.Logit)
	ig := explain.IntegratedGradients{Steps: 12, BatchSize: 8}

	roomy, err := explain.FromGraph(g, explain.GraphOptions{})
	if err != nil {
		t.Fatal(err)
	}
	bs := roomy.(explain.BatchSizer)
	if bs.MaxBatch(false) != 0 || bs.MaxBatch(true) != 0 {
		t.Fatal("MaxBatch before any pass should be 0 (unmeasured)")
	}
	want, err := ig.Attribute(ctx, roomy, x0, tg)
	if err != nil {
		t.Fatal(err)
	}
	fwd, bwd := bs.MaxBatch(false), bs.MaxBatch(true)
	if fwd < 1 || bwd < 1 || bwd > fwd {
		t.Fatalf("MaxBatch forward %d, for a gradient %d: want both ≥ 1 and the gradient's pass no smaller", fwd, bwd)
	}
	perImage := int64(explain.DefaultActivationBudget) / int64(bwd)

	tight, err := explain.FromGraph(g, explain.GraphOptions{ActivationBudget: perImage / 2})
	if err != nil {
		t.Fatal(err)
	}
	got, err := ig.Attribute(ctx, tight, x0, tg)
	if err != nil {
		t.Fatal(err)
	}
	if m := tight.(explain.BatchSizer).MaxBatch(true); m != 1 {
		t.Errorf("budget of half an image: MaxBatch %d, want 1", m)
	}
	if e := relErr(got.Map.Data, want.Map.Data); e > 1e-6 {
		t.Errorf("integrated gradients in batches of 1 differ from batches of 8 by %.2g (relative)", e)
	}
}
