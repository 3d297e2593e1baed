package engine

import (
	"context"
	"path/filepath"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// heldBytes is the tensor data of node outputs a Pass still holds.
func heldBytes(p *Pass) int64 {
	var n int64
	for v, t := range p.vals {
		if t != nil && p.g.producer[v] >= 0 {
			n += dataBytes(t)
		}
	}
	return n
}

// TestPlanMemoryResNet measures the execution plan on a real network, the
// compact ResNet-18 export (testdata/nets/resnet18, batch 2):
//   - forward only, the high-water mark of live activation bytes stays
//     within twice the largest activation (a fraction of all activations
//     computed), and only the logits are held afterwards;
//   - with Backward, what stays held is only what reverse mode reads (see
//     below), and the gradient computed from that subset equals, bit for
//     bit, the gradient of a run that keeps every value.
func TestPlanMemoryResNet(t *testing.T) {
	dir := filepath.Join("..", "testdata", "nets", "resnet18")
	m, err := onnx.Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		t.Fatal(err)
	}
	x, _, err := onnx.LoadTensor(filepath.Join(dir, "input.pb"))
	if err != nil {
		t.Fatal(err)
	}
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	feed := map[string]*tensor.Tensor{"input": x}

	fwd, err := g.Run(ctx, feed, RunOptions{})
	if err != nil {
		t.Fatal(err)
	}
	var total, largest int64 // every activation this pass computed, from the kept shapes
	for v, s := range fwd.shapes {
		if s != nil && g.producer[v] >= 0 {
			b := 4 * int64(tensor.Numel(s))
			total += b
			largest = max(largest, b)
		}
	}
	logits, _ := fwd.Value("logits")
	t.Logf("forward: %d activation bytes computed, peak live %d (%.1f%%), held after run %d",
		total, fwd.peakBytes, 100*float64(fwd.peakBytes)/float64(total), heldBytes(fwd))
	// ResNet's spatial size only shrinks after the stem, so the live set
	// (the running node's input and output, plus a block's skip tensor of
	// at most the same size) never exceeds the stem conv's output and its
	// ReLU: twice the largest activation.
	if fwd.peakBytes > 2*largest {
		t.Errorf("forward peak live bytes %d exceed twice the largest activation (%d): activations are not freed after their last use", fwd.peakBytes, largest)
	}
	if h := heldBytes(fwd); h != dataBytes(logits) {
		t.Errorf("forward-only run holds %d bytes, want only the logits' %d", h, dataBytes(logits))
	}

	bwd, err := g.Run(ctx, feed, RunOptions{Backward: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("forward for backward: peak live %d (%.1f%%), held after run %d (%.1f%%)",
		bwd.peakBytes, 100*float64(bwd.peakBytes)/float64(total), heldBytes(bwd), 100*float64(heldBytes(bwd))/float64(total))
	// Which values reverse mode may read: ReLU′ is readable from a ReLU's
	// input or its output, max pooling needs its input (or the argmax) and
	// output; Conv with constant weights, Add, GlobalAveragePool, Flatten
	// and Gemm with constant weights read no activation. So every held
	// activation must be a ReLU's or MaxPool's input or output, every ReLU
	// must have one of them held, and the Conv outputs that feed an Add
	// (the second conv of each block, the downsample convs) must be freed.
	allowed := map[string]bool{}
	consumers := map[string][]string{}
	for _, nd := range g.nodes {
		for _, in := range nd.src.Inputs {
			consumers[in] = append(consumers[in], nd.src.OpType)
		}
		switch nd.src.OpType {
		case "Relu", "MaxPool":
			for _, v := range append(append([]string{}, nd.src.Inputs...), nd.src.Outputs...) {
				allowed[v] = true
			}
		}
	}
	var relus, convAdd, maskBits int
	for _, nd := range g.nodes {
		out := nd.src.Outputs[0]
		_, held := bwd.Value(out)
		if held && !allowed[out] && out != "logits" {
			t.Errorf("%s: output held although no backward reads it", nd.label())
		}
		switch nd.src.OpType {
		case "Relu":
			relus++
			bits := bwd.bits != nil && bwd.bits[nd.out[0]] != nil // bitmask.go
			if _, inHeld := bwd.Value(nd.src.Inputs[0]); !inHeld && !held && !bits {
				t.Errorf("%s: neither input nor output held nor its mask bits, ReLU's backward needs one", nd.label())
			}
			if bits {
				maskBits++
			}
		case "Conv":
			if c := consumers[out]; len(c) == 1 && c[0] == "Add" {
				convAdd++
				if held {
					t.Errorf("%s: output feeds only an Add but is held", nd.label())
				}
			}
		}
	}
	if relus == 0 || convAdd == 0 {
		t.Fatalf("unexpected graph: %d Relu, %d Conv feeding Add", relus, convAdd)
	}
	// Every ReLU but the stem's (whose output MaxPool's backward reads)
	// keeps its mask as bits.
	if maskBits != relus-1 {
		t.Errorf("%d of %d ReLUs keep mask bits, want all but the stem's", maskBits, relus)
	}
	if heldBytes(bwd) >= total {
		t.Errorf("Backward run holds every activation (%d bytes)", total)
	}

	// The same gradient from a run that keeps everything.
	var all []string
	for v := range g.names {
		if g.producer[v] >= 0 {
			all = append(all, g.names[v])
		}
	}
	full, err := g.Run(ctx, feed, RunOptions{Keep: all, Backward: true})
	if err != nil {
		t.Fatal(err)
	}
	seed := tensor.New(logits.Shape...)
	for i := 3; i < len(seed.F32); i += logits.Shape[1] {
		seed.F32[i] = 1
	}
	seeds := map[string]*tensor.Tensor{"logits": seed}
	a, err := bwd.Backward(ctx, seeds, []string{"input"})
	if err != nil {
		t.Fatal(err)
	}
	b, err := full.Backward(ctx, seeds, []string{"input"})
	if err != nil {
		t.Fatal(err)
	}
	for i := range a["input"].F32 {
		if a["input"].F32[i] != b["input"].F32[i] {
			t.Fatalf("input gradient element %d: %g with the plan's retention, %g keeping everything", i, a["input"].F32[i], b["input"].F32[i])
		}
	}
}
