package engine_test

import (
	"bufio"
	"bytes"
	"context"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"heedmap/engine"
	"heedmap/onnx"
	"heedmap/tensor"
)

// The reference for these tests is PyTorch 1.13 autograd (Debian
// python3-torch, python3-torchvision 0.14): testdata/reference/export_nets.py
// builds eight architectures from torchvision's own blocks, exports them
// with torch.onnx.export (opset 13) and stores, for a fixed input x, the
// logits, the gradient of Σ_batch logit[class] with respect to x and to one
// inner activation, and that activation's value. Rerun the script to
// regenerate testdata/nets.

// netMeta is testdata/nets/<name>/meta.json.
type netMeta struct {
	Name   string `json:"name"`
	Input  string `json:"input"`
	Output string `json:"output"`
	Layer  string `json:"layer"`
	Class  int    `json:"class"`
	// Float64 is set for full-size exports: the goldens also exist
	// computed in float64 (*_f64.pb), see checkGradF64.
	Float64 bool `json:"float64_goldens"`
	// Spread is PyTorch float32's own distance from the float64 goldens
	// over several evaluations of the exported graph (full-size only).
	Spread *float32Spread `json:"float32_spread"`
}

// float32Spread is export_nets.py's float32_spread: one entry per PyTorch
// float32 evaluation of the exported graph, measured against the float64
// evaluation with the same definitions as engine.MaxRel and engine.CompareGrad.
type float32Spread struct {
	Reference string        `json:"reference"`
	Runs      []float32Eval `json:"runs"`
}

type float32Eval struct {
	Name string `json:"name"`
	// Kind "implementation": same input and weights, only the float32
	// summation order differs (thread count, memory format, convolution
	// algorithm). Kind "input": the input moved by one ulp; reported only.
	Kind         string    `json:"kind"`
	LogitsMaxRel float64   `json:"logits_max_rel"`
	LayerMaxRel  float64   `json:"layer_max_rel"`
	GradInput    gradError `json:"grad_input"`
	GradLayer    gradError `json:"grad_layer"`
}

type gradError struct {
	Cosine float64 `json:"cosine"`
	RelL2  float64 `json:"rel_l2"`
}

// Tolerances for float32 CPU arithmetic against PyTorch's float32 CPU
// kernels (summation order differs): logits within 1e-4 of their largest
// magnitude; gradients within cosine 0.9999 and relative L2 error 1e-3.
const (
	logitTol = 1e-4
	minCos   = 0.9999
	maxRelL2 = 1e-3
)

// TestCompactNetworks checks forward and reverse mode on the compact
// reference networks committed in testdata/nets.
func TestCompactNetworks(t *testing.T) {
	dirs, _ := filepath.Glob(filepath.Join("..", "testdata", "nets", "*", "meta.json"))
	if len(dirs) < 8 {
		t.Fatalf("expected 8 reference networks in testdata/nets, found %d", len(dirs))
	}
	for _, m := range dirs {
		dir := filepath.Dir(m)
		t.Run(filepath.Base(dir), func(t *testing.T) { checkNetwork(t, dir) })
	}
}

// TestFullSizeNetworks runs the same checks on the full-size torchvision
// architectures (random weights), exported on the fly by the reference
// script. Opt-in: HEEDMAP_FULLNETS=1 for all eight, or a comma-separated
// subset such as HEEDMAP_FULLNETS=resnet18,vit_b16 (needs /usr/bin/python3
// with torch, torchvision and onnx; several minutes and a few GB of memory).
// HEEDMAP_FULLNETS_DIR=DIR reuses exports already made with
// export_nets.py --full --out DIR instead of exporting again.
// Logits are held to the compact nets' 1e-4 against the exported graph
// computed in float64 (checkValueF64). Gradients are checked twice: against
// the float64 gradient with the compact nets' bounds widened, per net, to
// the worst of PyTorch's own float32 evaluations of the same graph
// (checkGradF64), and against the float64 gradient on the ReLU, Clip and
// max-pool branches our forward took, with the compact nets' bounds
// unwidened (checkSameBranch).
func TestFullSizeNetworks(t *testing.T) {
	sel := os.Getenv("HEEDMAP_FULLNETS")
	if sel == "" {
		t.Skip("set HEEDMAP_FULLNETS=1 (or a list of names) to export and check the full-size networks")
	}
	var names []string
	want := 8
	if sel != "1" {
		names = strings.Split(sel, ",")
		want = len(names)
	}
	out := os.Getenv("HEEDMAP_FULLNETS_DIR")
	if out == "" {
		out = t.TempDir()
		args := append([]string{filepath.Join("..", "testdata", "reference", "export_nets.py"), "--full", "--out", out}, names...)
		cmd := exec.Command("/usr/bin/python3", args...)
		cmd.Stderr = os.Stderr
		if b, err := cmd.Output(); err != nil {
			t.Fatalf("export_nets.py --full: %v\n%s", err, b)
		} else {
			t.Logf("%s", b)
		}
	}
	var dirs []string
	if names == nil {
		dirs, _ = filepath.Glob(filepath.Join(out, "*", "meta.json"))
	} else {
		for _, n := range names {
			if p := filepath.Join(out, n, "meta.json"); fileExists(p) {
				dirs = append(dirs, p)
			}
		}
	}
	if len(dirs) != want {
		t.Fatalf("expected %d exported networks in %s, found %d", want, out, len(dirs))
	}
	for _, m := range dirs {
		dir := filepath.Dir(m)
		t.Run(filepath.Base(dir), func(t *testing.T) { checkNetwork(t, dir) })
	}
}

func checkNetwork(t *testing.T, dir string) {
	b, err := os.ReadFile(filepath.Join(dir, "meta.json"))
	if err != nil {
		t.Fatal(err)
	}
	var meta netMeta
	if err := json.Unmarshal(b, &meta); err != nil {
		t.Fatalf("meta.json: %v", err)
	}
	load := func(file string) *tensor.Tensor {
		tt, _, err := onnx.LoadTensor(filepath.Join(dir, file))
		if err != nil {
			t.Fatal(err)
		}
		return tt
	}
	g, err := engine.Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		t.Fatal(err)
	}
	x := load("input.pb")
	ctx := context.Background()
	keep := []string{meta.Layer}
	var branches []branchNode
	if meta.Float64 {
		branches = branchNodes(t, filepath.Join(dir, "model.onnx"))
		for _, b := range branches {
			keep = append(keep, b.Output)
		}
	}
	pass, err := g.Run(ctx, map[string]*tensor.Tensor{meta.Input: x}, engine.RunOptions{Keep: keep, Backward: true})
	if err != nil {
		t.Fatal(err)
	}
	logits, ok := pass.Value(meta.Output)
	if !ok {
		t.Fatalf("no output %q", meta.Output)
	}
	want := load("logits.pb")
	if !slices.Equal(logits.Shape, want.Shape) {
		t.Fatalf("logits %v, PyTorch %v", logits, want)
	}
	act, ok := pass.Value(meta.Layer)
	if !ok {
		t.Fatalf("layer %q not kept", meta.Layer)
	}
	wantAct := load("layer.pb")
	if !slices.Equal(act.Shape, wantAct.Shape) {
		t.Fatalf("layer %q: %v, PyTorch %v", meta.Layer, act, wantAct)
	}
	if meta.Float64 {
		if meta.Spread == nil || len(implementationRuns(meta.Spread)) == 0 {
			t.Fatalf("meta.json has float64 goldens but no float32_spread implementation runs: re-export with export_nets.py --full")
		}
		checkValueF64(t, "logits", logits.F32, want.F32, load("logits_f64.pb").F32, meta.Spread, false, func(e float32Eval) float64 { return e.LogitsMaxRel })
		checkValueF64(t, "layer "+meta.Layer+" value", act.F32, wantAct.F32, load("layer_f64.pb").F32, meta.Spread, true, func(e float32Eval) float64 { return e.LayerMaxRel })
	} else {
		if e := engine.MaxRel(logits.F32, want.F32); e > logitTol {
			t.Errorf("logits: max|a-b|/max|b| = %.2e > %.0e vs PyTorch", e, logitTol)
		} else {
			t.Logf("logits: max|a-b|/max|b| = %.2e", e)
		}
		if e := engine.MaxRel(act.F32, wantAct.F32); e > logitTol {
			t.Errorf("layer %q value: max|a-b|/max|b| = %.2e vs PyTorch", meta.Layer, e)
		}
	}

	seed := tensor.New(logits.Shape...)
	classes := logits.Shape[len(logits.Shape)-1]
	for i := meta.Class; i < len(seed.F32); i += classes {
		seed.F32[i] = 1
	}
	grads, err := pass.Backward(ctx, map[string]*tensor.Tensor{meta.Output: seed}, []string{meta.Input, meta.Layer})
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct{ name, file string }{{meta.Input, "grad_input.pb"}, {meta.Layer, "grad_layer.pb"}} {
		got := grads[c.name]
		want := load(c.file)
		if got == nil || !slices.Equal(got.Shape, want.Shape) {
			t.Errorf("gradient w.r.t. %q: %v, PyTorch %v", c.name, got, want)
			continue
		}
		if meta.Float64 {
			base := strings.TrimSuffix(c.file, ".pb")
			pick := func(e float32Eval) gradError { return e.GradInput }
			if c.file == "grad_layer.pb" {
				pick = func(e float32Eval) gradError { return e.GradLayer }
			}
			checkGradF64(t, c.name, got.F32, want.F32, load(base+"_f64.pb").F32, meta.Spread, pick)
			continue
		}
		cos, rel := engine.CompareGrad(got.F32, want.F32)
		if cos < minCos || rel > maxRelL2 || math.IsNaN(cos) || math.IsNaN(rel) {
			t.Errorf("gradient w.r.t. %q: cosine %.6f (need ≥ %v), relative L2 %.2e (need ≤ %.0e) vs PyTorch", c.name, cos, minCos, rel, maxRelL2)
		} else {
			t.Logf("gradient w.r.t. %q: cosine %.7f, relative L2 %.2e", c.name, cos, rel)
		}
	}
	if meta.Float64 {
		checkSameBranch(t, dir, pass, branches, grads[meta.Input], grads[meta.Layer])
	}
}

// Full-size networks are judged against the exported graph's own function
// computed in float64 (*_f64.pb: export_nets.py loads the ONNX file's
// BatchNorm-folded weights back into the torchvision model and runs it in
// float64), not against one PyTorch float32 result. The gradient
// bounds (cosine ≥ 0.9999, relative L2 ≤ 1e-3) presuppose that two correct
// float32 computations agree that closely; at 224×224 and 299×299 they do
// not for ReLU networks. A ReLU's derivative jumps at zero, and a handful of
// the millions of pre-activations lie within float32 rounding of zero, so
// the branch taken depends on summation order. export_nets.py measures it:
// PyTorch float32 on the same graph and input, with 1 or 2 threads, NHWC
// memory format or oneDNN disabled, lands between 1.5e-3 and 1.0e-2 from
// float64 on ResNet-18 (relu_flips.py: 2 to 6 of 4.6 million ReLUs take the
// other branch; forced onto float64's branches the same float32 arithmetic
// is within 1.8e-6). Such an error says nothing about the runtime being
// wrong, and PyTorch itself fails the bounds by it.
//
// So each full-size net's gradient bound is the bound widened to the
// worst PyTorch float32 evaluation of kind "implementation" recorded in
// meta.json for that net: relative L2 ≤ max(1e-3, PyTorch's largest) and
// cosine ≥ min(0.9999, PyTorch's smallest). Nets without such kinks
// (ConvNeXt, EfficientNet-B0, MobileNetV3, ViT) keep the bounds
// because PyTorch stays within them there. The one-ulp input runs are
// reported, never used for a bound: they evaluate another input. Logits
// keep 1e-4 against float64 with no widening; the inner activation's value
// is widened the same way (see checkValueF64). Trade-off: the worst of four PyTorch
// runs is a sample of a heavy-tailed quantity, so a correct runtime can
// land just beyond it on an unlucky net; the message prints every run.

// implementationRuns are the spread runs that evaluate the same input.
func implementationRuns(s *float32Spread) []float32Eval {
	var runs []float32Eval
	for _, r := range s.Runs {
		if r.Kind == "implementation" {
			runs = append(runs, r)
		}
	}
	return runs
}

// checkValueF64 judges a forward value by max|a−b|/max|b| against the
// float64 truth: ≤ logitTol, or with widen ≤ the largest error of PyTorch
// float32's implementation runs if that is larger. The logits are never
// widened (PyTorch stays within 1e-4 on all eight nets); the inner
// activation is, because at 299×299 Inception-v3's Mixed_7c output is off
// by 1.4e-4 to 2.1e-4 in every PyTorch float32 run.
func checkValueF64(t *testing.T, what string, got, unfolded, truth []float32, spread *float32Spread, widen bool, pick func(float32Eval) float64) {
	t.Helper()
	ours := engine.MaxRel(got, truth)
	need := logitTol
	var torch []string
	for _, r := range spread.Runs {
		torch = append(torch, fmt.Sprintf("%s %.1e", r.Name, pick(r)))
		if widen && r.Kind == "implementation" {
			need = math.Max(need, pick(r))
		}
	}
	msg := fmt.Sprintf("%s: max|a-b|/max|b| vs float64 graph = %.2e (need ≤ %.2e; PyTorch float32: %s; ours vs PyTorch float32 unfolded: %.2e)",
		what, ours, need, strings.Join(torch, ", "), engine.MaxRel(got, unfolded))
	if !(ours <= need) {
		t.Errorf("%s", msg)
	} else {
		t.Log(msg)
	}
}

// checkGradF64 judges a gradient by cosine and relative L2 error against
// the float64 truth, with the bounds widened to PyTorch float32's
// worst implementation run (see above).
func checkGradF64(t *testing.T, name string, got, unfolded, truth []float32, spread *float32Spread, pick func(float32Eval) gradError) {
	t.Helper()
	cos, rel := engine.CompareGrad(got, truth)
	needCos, needRel := minCos, maxRelL2
	var torch []string
	for _, r := range spread.Runs {
		e := pick(r)
		torch = append(torch, fmt.Sprintf("%s %.7f/%.2e", r.Name, e.Cosine, e.RelL2))
		if r.Kind == "implementation" {
			needCos = math.Min(needCos, e.Cosine)
			needRel = math.Max(needRel, e.RelL2)
		}
	}
	ucos, urel := engine.CompareGrad(got, unfolded)
	msg := fmt.Sprintf("gradient w.r.t. %q vs float64 graph: cosine %.7f, relative L2 %.2e (need ≥ %.7f, ≤ %.2e; PyTorch float32 cosine/relative L2: %s; ours vs PyTorch float32 unfolded: %.7f/%.2e)",
		name, cos, rel, needCos, needRel, strings.Join(torch, ", "), ucos, urel)
	if !(cos >= needCos && rel <= needRel) { // false for NaN too
		t.Errorf("%s", msg)
	} else {
		t.Log(msg)
	}
}

// branchNode is a Relu, Clip or MaxPool node of a full-size export: the
// units whose side of a kink (or argmax) decides which piece of the
// network's piecewise function, and so which gradient, a float32 evaluation
// computes.
type branchNode struct {
	Op     string `json:"op"`
	Output string `json:"output"`
	Shape  []int  `json:"shape"`
}

// branchNodes lists model's Relu, Clip and MaxPool nodes in graph order,
// each with the tensor that shows the side it took: the output of Relu and
// Clip, the input of MaxPool (its argmax).
func branchNodes(t *testing.T, model string) []branchNode {
	t.Helper()
	m, err := onnx.Load(model)
	if err != nil {
		t.Fatal(err)
	}
	bs := []branchNode{} // "[]" in JSON even for a net without such nodes
	for _, n := range m.Graph.Nodes {
		switch n.OpType {
		case "Relu", "Clip":
			bs = append(bs, branchNode{Op: n.OpType, Output: n.Outputs[0]})
		case "MaxPool": // its argmax is decided on its input
			bs = append(bs, branchNode{Op: n.OpType, Output: n.Inputs[0]})
		}
	}
	return bs
}

// checkSameBranch is the steady form of the full-size gradient check. Our
// float32 forward pass took one side of every ReLU/ReLU6 kink and one
// argmax in every max-pool window;
// testdata/reference/same_branch_grad.py computes in float64 the gradient
// of the exported graph on exactly those sides (the piece of the piecewise
// function we evaluated), and our gradients must match it within the
// issue's own bounds, cosine ≥ 0.9999 and relative L2 ≤ 1e-3, unwidened.
// A wrong operator backward, or a forward value far enough off to change
// more than a rounding-level decision, still fails here; only the choice of
// side for units within rounding of a kink is not held against us.
// Max-pool windows route to the argmax of our own input values (Inception-v3
// has near-ties: with float64's argmax kept, its residual was 2.9e-3).
func checkSameBranch(t *testing.T, dir string, pass *engine.Pass, branches []branchNode, gotInput, gotLayer *tensor.Tensor) {
	t.Helper()
	tmp := t.TempDir()
	bin, err := os.Create(filepath.Join(tmp, "branches.f32"))
	if err != nil {
		t.Fatal(err)
	}
	w := bufio.NewWriterSize(bin, 1<<20)
	for i := range branches {
		v, ok := pass.Value(branches[i].Output)
		if !ok {
			t.Fatalf("%s output %q not kept", branches[i].Op, branches[i].Output)
		}
		branches[i].Shape = v.Shape
		if err := binary.Write(w, binary.LittleEndian, v.F32); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Flush(); err != nil {
		t.Fatal(err)
	}
	if err := bin.Close(); err != nil {
		t.Fatal(err)
	}
	idx, err := json.Marshal(branches)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(tmp, "branches.json"), idx, 0o644); err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command("/usr/bin/python3", filepath.Join("..", "testdata", "reference", "same_branch_grad.py"),
		dir, filepath.Join(tmp, "branches.json"), filepath.Join(tmp, "branches.f32"), tmp)
	out, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("same_branch_grad.py: %v\n%s", err, out)
	}
	t.Logf("%s", bytes.TrimSpace(out))
	for _, c := range []struct {
		what string
		got  *tensor.Tensor
		file string
	}{{"input", gotInput, "grad_input_branch.pb"}, {"layer", gotLayer, "grad_layer_branch.pb"}} {
		want, _, err := onnx.LoadTensor(filepath.Join(tmp, c.file))
		if err != nil {
			t.Fatal(err)
		}
		if c.got == nil || !slices.Equal(c.got.Shape, want.Shape) {
			t.Errorf("%s gradient %v, same-branch float64 %v", c.what, c.got, want)
			continue
		}
		cos, rel := engine.CompareGrad(c.got.F32, want.F32)
		msg := fmt.Sprintf("%s gradient vs float64 on our branches: cosine %.7f, relative L2 %.2e", c.what, cos, rel)
		if !(cos >= minCos && rel <= maxRelL2) {
			t.Errorf("%s (need ≥ %v, ≤ %.0e)", msg, minCos, maxRelL2)
		} else {
			t.Log(msg)
		}
	}
}

func fileExists(p string) bool {
	_, err := os.Stat(p)
	return err == nil
}
