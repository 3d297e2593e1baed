package onnx_test

import (
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"slices"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// refEntry is one tensor as ONNX's Python decoder (onnx.numpy_helper) reads
// it; testdata/numpy_values.json is written by testdata/numpy_values.py.
type refEntry struct {
	File        string    `json:"file"`
	Tensor      string    `json:"tensor"`
	Initializer string    `json:"initializer"`
	Node        *int      `json:"node"`
	Attr        string    `json:"attr"`
	DType       string    `json:"dtype"`
	Shape       []int     `json:"shape"`
	Sum         float64   `json:"sum"`
	First       []float64 `json:"first"`
}

// TestValuesMatchNumpyHelper compares decoded values, shapes and sums with
// those onnx.numpy_helper produced from the same files (raw_data and typed
// fields, every integer width, bool, float16 and double).
func TestValuesMatchNumpyHelper(t *testing.T) {
	conformanceModels(t) // skips without the data
	b, err := os.ReadFile("testdata/numpy_values.json")
	if err != nil {
		t.Fatal(err)
	}
	var refs []refEntry
	if err := json.Unmarshal(b, &refs); err != nil {
		t.Fatal(err)
	}
	if len(refs) < 20 {
		t.Fatalf("only %d reference entries", len(refs))
	}
	models := map[string]*onnx.Model{}
	for _, r := range refs {
		path := filepath.Join(testdataRoot, r.File)
		var got *tensor.Tensor
		label := r.File
		switch {
		case r.Initializer != "" || r.Node != nil:
			m := models[path]
			if m == nil {
				if m, err = onnx.Load(path); err != nil {
					t.Fatal(err)
				}
				models[path] = m
			}
			if r.Initializer != "" {
				label += " initializer " + r.Initializer
				got = m.Graph.Initializers[r.Initializer]
			} else {
				label += " node attr " + r.Attr
				if a := m.Graph.Nodes[*r.Node].Attrs[r.Attr]; a != nil {
					got = a.Tensor
				}
			}
		default:
			var name string
			if got, name, err = onnx.LoadTensor(path); err != nil {
				t.Errorf("%s: %v", label, err)
				continue
			}
			if name != r.Tensor {
				t.Errorf("%s: name %q, want %q", label, name, r.Tensor)
			}
		}
		if got == nil {
			t.Errorf("%s: not decoded", label)
			continue
		}
		checkAgainstRef(t, label, got, r)
	}
}

func checkAgainstRef(t *testing.T, label string, got *tensor.Tensor, r refEntry) {
	t.Helper()
	if !slices.Equal(got.Shape, r.Shape) {
		t.Errorf("%s: shape %v, numpy_helper %v", label, got.Shape, r.Shape)
		return
	}
	want := tensor.Float32
	switch r.DType {
	case "bool":
		want = tensor.Bool
	case "int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64":
		want = tensor.Int64
	}
	if got.DType != want {
		t.Errorf("%s: dtype %v for numpy %s", label, got.DType, r.DType)
		return
	}
	vals := make([]float64, got.Len())
	for i := range vals {
		if got.DType == tensor.Float32 {
			vals[i] = float64(got.F32[i])
		} else {
			vals[i] = float64(got.I64[i])
		}
	}
	// Float64 sources lose precision in float32; everything else is exact.
	tol := 0.0
	if r.DType == "float64" {
		tol = 1e-7
	}
	var sum, abs float64
	for i, v := range vals {
		sum += v
		abs += math.Abs(v)
		if i < len(r.First) && math.Abs(v-r.First[i]) > tol*math.Abs(r.First[i]) {
			t.Errorf("%s: value %d = %v, numpy_helper %v", label, i, v, r.First[i])
		}
	}
	if math.Abs(sum-r.Sum) > 1e-9*abs+tol*abs {
		t.Errorf("%s: sum %v, numpy_helper %v", label, sum, r.Sum)
	}
}
