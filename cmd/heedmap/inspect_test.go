package main

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	"heedmap/onnx/onnxpb"
)

// inspectGolden is testdata/reference/inspect_golden.json, written by
// testdata/reference/inspect_golden.py with the onnx Python package.
type inspectGolden struct {
	Inputs, Outputs []struct {
		Name, Dtype string
		Dims        []string
	}
	Opsets     map[string]int64
	Ops        map[string]int
	Parameters int64
}

// TestInspectCompactNets checks `heedmap inspect` on the eight compact
// reference exports against the onnx Python package's reading of the same
// files (inspect_golden.json) and the Grad-CAM layer against the layer
// export_nets.py found with a PyTorch forward hook (meta.json "layer").
func TestInspectCompactNets(t *testing.T) {
	b, err := os.ReadFile("../../testdata/reference/inspect_golden.json")
	if err != nil {
		t.Fatal(err)
	}
	var golden map[string]json.RawMessage
	if err := json.Unmarshal(b, &golden); err != nil {
		t.Fatal(err)
	}
	n := 0
	for name, raw := range golden {
		if strings.HasPrefix(name, "_") {
			continue
		}
		n++
		t.Run(name, func(t *testing.T) {
			var g inspectGolden
			if err := json.Unmarshal(raw, &g); err != nil {
				t.Fatal(err)
			}
			dir := filepath.Join("..", "..", "testdata", "nets", name)
			code, out, errText := runCLI(t, "inspect", filepath.Join(dir, "model.onnx"))
			if code != 0 {
				t.Fatalf("exit %d\n%s%s", code, out, errText)
			}
			var want []string
			for _, vi := range g.Inputs {
				want = append(want, fmt.Sprintf("input:      %s %s [%s]\n", vi.Name, vi.Dtype, strings.Join(vi.Dims, ", ")))
			}
			for _, vi := range g.Outputs {
				want = append(want, fmt.Sprintf("output:     %s %s [%s]\n", vi.Name, vi.Dtype, strings.Join(vi.Dims, ", ")))
			}
			var opsets []string
			for d, v := range g.Opsets {
				opsets = append(opsets, fmt.Sprintf("%s %d", d, v))
			}
			sort.Strings(opsets)
			want = append(want, "opsets:     "+strings.Join(opsets, ", ")+"\n",
				fmt.Sprintf("parameters: %d\n", g.Parameters), "support:    every node is supported\n")
			for op, c := range g.Ops {
				want = append(want, fmt.Sprintf("%s×%d", op, c))
			}
			for _, w := range want {
				if !strings.Contains(out, w) {
					t.Errorf("output lacks %q", strings.TrimSpace(w))
				}
			}
			if line := lineWith(out, "operators:"); strings.Count(line, "×") != len(g.Ops) {
				t.Errorf("histogram has %d op types, onnx reads %d: %s", strings.Count(line, "×"), len(g.Ops), line)
			}

			mb, err := os.ReadFile(filepath.Join(dir, "meta.json"))
			if err != nil {
				t.Fatal(err)
			}
			var meta struct{ Layer string }
			json.Unmarshal(mb, &meta)
			cam := lineWith(out, "grad-cam:")
			if strings.HasPrefix(name, "vit") {
				// ViT classifies the class token: no 4-D activation is pooled.
				if !strings.Contains(cam, "no default layer") {
					t.Errorf("ViT: %s", cam)
				}
			} else if cam != "grad-cam:   default layer "+meta.Layer {
				t.Errorf("%s, want the PyTorch hook's layer %s", cam, meta.Layer)
			}
		})
	}
	if n != 8 {
		t.Errorf("inspect_golden.json lists %d nets, want 8", n)
	}
}

func lineWith(out, prefix string) string {
	for _, l := range strings.Split(out, "\n") {
		if strings.HasPrefix(l, prefix) {
			return l
		}
	}
	return ""
}

// TestInspectUnsupportedNodes builds a model with the generated onnx.proto
// bindings holding two nodes no runtime op implements (an unknown op type
// in the default domain and an op from a custom domain); inspect must still
// describe the model, list both nodes by name and op type, name the
// Grad-CAM layer, and exit 1.
func TestInspectUnsupportedNodes(t *testing.T) {
	f32 := int32(onnxpb.TensorProto_FLOAT)
	dim := func(v int64) *onnxpb.TensorShapeProto_Dimension {
		return &onnxpb.TensorShapeProto_Dimension{Value: &onnxpb.TensorShapeProto_Dimension_DimValue{DimValue: v}}
	}
	vi := func(name string, dims ...*onnxpb.TensorShapeProto_Dimension) *onnxpb.ValueInfoProto {
		return &onnxpb.ValueInfoProto{Name: proto.String(name), Type: &onnxpb.TypeProto{Value: &onnxpb.TypeProto_TensorType{
			TensorType: &onnxpb.TypeProto_Tensor{ElemType: proto.Int32(f32), Shape: &onnxpb.TensorShapeProto{Dim: dims}}}}}
	}
	batch := &onnxpb.TensorShapeProto_Dimension{Value: &onnxpb.TensorShapeProto_Dimension_DimParam{DimParam: "n"}}
	node := func(name, op, domain string, in, out []string) *onnxpb.NodeProto {
		return &onnxpb.NodeProto{Name: proto.String(name), OpType: proto.String(op), Domain: proto.String(domain), Input: in, Output: out}
	}
	w := &onnxpb.TensorProto{Name: proto.String("w"), Dims: []int64{4, 3, 3, 3}, DataType: proto.Int32(f32), FloatData: make([]float32, 108)}
	bias := &onnxpb.TensorProto{Name: proto.String("b"), Dims: []int64{4}, DataType: proto.Int32(f32), FloatData: make([]float32, 4)}
	m := &onnxpb.ModelProto{
		IrVersion: proto.Int64(8),
		OpsetImport: []*onnxpb.OperatorSetIdProto{
			{Domain: proto.String(""), Version: proto.Int64(13)},
			{Domain: proto.String("com.example.vendor"), Version: proto.Int64(1)},
		},
		Graph: &onnxpb.GraphProto{
			Name:        proto.String("g"),
			Input:       []*onnxpb.ValueInfoProto{vi("image", batch, dim(3), dim(8), dim(8))},
			Output:      []*onnxpb.ValueInfoProto{vi("score", batch, dim(4))},
			Initializer: []*onnxpb.TensorProto{w, bias},
			Node: []*onnxpb.NodeProto{
				node("stem", "Conv", "", []string{"image", "w", "b"}, []string{"c"}),
				node("mystery_norm", "FrobNorm", "", []string{"c"}, []string{"d"}),
				node("vendor_act", "FastGelu", "com.example.vendor", []string{"d"}, []string{"e"}),
				node("pool", "GlobalAveragePool", "", []string{"e"}, []string{"p"}),
				node("flat", "Flatten", "", []string{"p"}, []string{"score"}),
			},
		},
	}
	b, err := proto.Marshal(m)
	if err != nil {
		t.Fatal(err)
	}
	p := filepath.Join(t.TempDir(), "m.onnx")
	if err := os.WriteFile(p, b, 0o644); err != nil {
		t.Fatal(err)
	}
	code, out, errText := runCLI(t, "inspect", p)
	if code != exitFailed {
		t.Errorf("exit %d, want %d\n%s%s", code, exitFailed, out, errText)
	}
	for _, want := range []string{
		"input:      image float32 [n, 3, 8, 8]",
		"output:     score float32 [n, 4]",
		"opsets:     ai.onnx 13, com.example.vendor 1",
		"parameters: 112", // 4·3·3·3 weights + 4 biases
		"Conv×1", "FrobNorm×1", "com.example.vendor.FastGelu×1", "GlobalAveragePool×1", "Flatten×1",
		"unsupported: 2 node(s)",
		`"mystery_norm" (FrobNorm)`,
		`"vendor_act" (FastGelu, domain com.example.vendor)`,
		"grad-cam:   default layer e",
	} {
		if !strings.Contains(out, want) {
			t.Errorf("inspect output lacks %q:\n%s", want, out)
		}
	}
	if strings.Contains(out, `"stem"`) || strings.Contains(out, `"pool"`) {
		t.Errorf("a supported node is listed as unsupported:\n%s", out)
	}
}
