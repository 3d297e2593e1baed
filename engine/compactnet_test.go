package engine

import (
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// compactNet is one compact reference network committed in
// testdata/nets/<name> (made by testdata/reference/export_nets.py), loaded
// the way the arena and fusion tests share: its meta.json, its reference
// input and the compiled graph.
type compactNet struct {
	dir  string
	meta struct {
		Input, Output string
		Layer         string // the layer the reference gradients also cover
		Class         int    // the logit the reference gradients explain
	}
	x *tensor.Tensor
	g *Graph
}

// loadCompactNet loads testdata/nets/<name>; the test is skipped when the
// network is not committed.
func loadCompactNet(t *testing.T, name string) compactNet {
	t.Helper()
	n := compactNet{dir: filepath.Join("..", "testdata", "nets", name)}
	b, err := os.ReadFile(filepath.Join(n.dir, "meta.json"))
	if err != nil {
		t.Skip(err)
	}
	if err := json.Unmarshal(b, &n.meta); err != nil {
		t.Fatal(err)
	}
	n.x = n.tensor(t, "input.pb")
	if n.g, err = Load(filepath.Join(n.dir, "model.onnx")); err != nil {
		t.Fatal(err)
	}
	return n
}

// tensor loads one of the network's TensorProto files (input.pb,
// logits.pb, ...).
func (n compactNet) tensor(t *testing.T, file string) *tensor.Tensor {
	t.Helper()
	x, _, err := onnx.LoadTensor(filepath.Join(n.dir, file))
	if err != nil {
		t.Fatal(err)
	}
	return x
}

// runBackward runs the network on x with opt (Backward set) and takes the
// gradient of Σ_batch logit[class] with respect to wrt.
func (n compactNet) runBackward(t *testing.T, x *tensor.Tensor, opt RunOptions, wrt ...string) (*Pass, map[string]*tensor.Tensor) {
	t.Helper()
	opt.Backward = true
	p, err := n.g.Run(context.Background(), map[string]*tensor.Tensor{n.meta.Input: x}, opt)
	if err != nil {
		t.Fatal(err)
	}
	logits, _ := p.Value(n.meta.Output)
	seed := tensor.New(logits.Shape...)
	for i := 0; i < logits.Shape[0]; i++ {
		seed.F32[i*logits.Shape[1]+n.meta.Class] = 1
	}
	g, err := p.Backward(context.Background(), map[string]*tensor.Tensor{n.meta.Output: seed}, wrt)
	if err != nil {
		t.Fatal(err)
	}
	return p, g
}
