package onnx_test

import (
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	"heedmap/onnx"
	"heedmap/onnx/onnxpb"
)

func f32bytes(n int) []byte { return make([]byte, 4*n) }

// model wraps one initializer in a minimal valid model.
func model(t *testing.T, tp *onnxpb.TensorProto) []byte {
	t.Helper()
	m := &onnxpb.ModelProto{
		IrVersion:   proto.Int64(8),
		OpsetImport: []*onnxpb.OperatorSetIdProto{{Domain: proto.String(""), Version: proto.Int64(13)}},
		Graph: &onnxpb.GraphProto{
			Name:        proto.String("g"),
			Initializer: []*onnxpb.TensorProto{tp},
			Node: []*onnxpb.NodeProto{{
				OpType: proto.String("Identity"), Input: []string{tp.GetName()}, Output: []string{"y"},
			}},
		},
	}
	b, err := proto.Marshal(m)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func float32Tensor(name string, dims []int64, raw []byte) *onnxpb.TensorProto {
	return &onnxpb.TensorProto{
		Name: proto.String(name), Dims: dims,
		DataType: proto.Int32(int32(onnxpb.TensorProto_FLOAT)), RawData: raw,
	}
}

// TestHostileTensors feeds malformed tensors and requires an error that names
// the file and the tensor, and no large allocation.
func TestHostileTensors(t *testing.T) {
	cases := []struct {
		name string
		tp   *onnxpb.TensorProto
		want string
	}{
		{"negative dim", float32Tensor("neg", []int64{2, -3}, f32bytes(6)), "negative"},
		{"overflowing dims", float32Tensor("ovf", []int64{1 << 31, 1 << 31, 1 << 31}, f32bytes(1)), "overflow"},
		{"10^12 elements", float32Tensor("huge", []int64{1000000, 1000000}, f32bytes(4)), "need"},
		{"raw length mismatch", float32Tensor("short", []int64{2, 3}, f32bytes(5)), "need 24 bytes but raw data has 20"},
		{"typed count mismatch", &onnxpb.TensorProto{Name: proto.String("typed"), Dims: []int64{1000000, 1000000},
			DataType: proto.Int32(int32(onnxpb.TensorProto_INT64)), Int64Data: []int64{1, 2}}, "need 1000000000000 values but the file holds 2"},
		{"string tensor", &onnxpb.TensorProto{Name: proto.String("words"), Dims: []int64{1},
			DataType: proto.Int32(int32(onnxpb.TensorProto_STRING)), StringData: [][]byte{[]byte("a")}}, "STRING is not supported"},
		{"complex tensor", &onnxpb.TensorProto{Name: proto.String("z"), Dims: []int64{1},
			DataType: proto.Int32(int32(onnxpb.TensorProto_COMPLEX64)), FloatData: []float32{1, 2}}, "COMPLEX64 is not supported"},
		{"no data type", &onnxpb.TensorProto{Name: proto.String("untyped"), Dims: []int64{1}}, "data_type is not set"},
		{"external escape", external("esc", []int64{1}, "../outside.bin", "", ""), "escapes"},
		{"external absolute", external("abs", []int64{1}, "/etc/passwd", "", ""), "escapes"},
		{"external missing", external("gone", []int64{1}, "missing.bin", "", ""), "missing.bin"},
		{"external too short", external("ext", []int64{100}, "weights.bin", "0", ""), "need 400 bytes"},
		{"external offset past end", external("off", []int64{1}, "weights.bin", "1000", ""), "past the end"},
		{"external bad length", external("len", []int64{1}, "weights.bin", "0", "-4"), "non-negative"},
		{"external symlink out", external("link", []int64{1}, "link.bin", "", ""), "link.bin"},
	}
	dir := t.TempDir()
	if err := os.WriteFile(filepath.Join(dir, "weights.bin"), f32bytes(4), 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(filepath.Dir(dir), "outside.bin"), f32bytes(1), 0o644); err != nil {
		t.Fatal(err)
	}
	defer os.Remove(filepath.Join(filepath.Dir(dir), "outside.bin"))
	// A symlink inside the model's directory that leads out of it.
	if err := os.Symlink(filepath.Join(filepath.Dir(dir), "outside.bin"), filepath.Join(dir, "link.bin")); err != nil {
		t.Fatal(err)
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			path := filepath.Join(dir, "hostile.onnx")
			if err := os.WriteFile(path, model(t, c.tp), 0o644); err != nil {
				t.Fatal(err)
			}
			var before, after runtime.MemStats
			runtime.ReadMemStats(&before)
			_, err := onnx.Load(path)
			runtime.ReadMemStats(&after)
			if err == nil {
				t.Fatal("decoded without error")
			}
			msg := err.Error()
			for _, w := range []string{"hostile.onnx", `"` + c.tp.GetName() + `"`, c.want} {
				if !strings.Contains(msg, w) {
					t.Errorf("error %q does not mention %q", msg, w)
				}
			}
			if grew := after.TotalAlloc - before.TotalAlloc; grew > 1<<20 {
				t.Errorf("allocated %d bytes for a tiny hostile file", grew)
			}
		})
	}
}

func external(name string, dims []int64, loc, offset, length string) *onnxpb.TensorProto {
	kv := []*onnxpb.StringStringEntryProto{{Key: proto.String("location"), Value: proto.String(loc)}}
	if offset != "" {
		kv = append(kv, &onnxpb.StringStringEntryProto{Key: proto.String("offset"), Value: proto.String(offset)})
	}
	if length != "" {
		kv = append(kv, &onnxpb.StringStringEntryProto{Key: proto.String("length"), Value: proto.String(length)})
	}
	return &onnxpb.TensorProto{
		Name: proto.String(name), Dims: dims, DataType: proto.Int32(int32(onnxpb.TensorProto_FLOAT)),
		DataLocation: onnxpb.TensorProto_EXTERNAL.Enum(), ExternalData: kv,
	}
}

// TestExternalData reads a tensor kept beside the model at an offset, as the
// ONNX external-data convention (location/offset/length) describes.
func TestExternalData(t *testing.T) {
	dir := t.TempDir()
	raw := []byte{0xff, 0xff, 0, 0, 0x80, 0x3f, 0, 0, 0, 0xc0} // pad, 1.0, -2.0
	if err := os.WriteFile(filepath.Join(dir, "w.bin"), raw, 0o644); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(dir, "m.onnx")
	if err := os.WriteFile(path, model(t, external("w", []int64{2}, "w.bin", "2", "8")), 0o644); err != nil {
		t.Fatal(err)
	}
	m, err := onnx.Load(path)
	if err != nil {
		t.Fatal(err)
	}
	w := m.Graph.Initializers["w"]
	if w == nil || len(w.F32) != 2 || w.F32[0] != 1 || w.F32[1] != -2 {
		t.Fatalf("external tensor = %v", w)
	}
	data, _ := os.ReadFile(path)
	if _, err := onnx.Decode(data, ""); err == nil || !strings.Contains(err.Error(), "no directory") {
		t.Fatalf("Decode without dir: %v", err)
	}
}

// TestCorruptFiles truncates a real model at many points and feeds bytes that
// are not protobuf: every case must fail cleanly.
func TestCorruptFiles(t *testing.T) {
	conformanceModels(t)
	path := filepath.Join(testdataRoot, "pytorch-converted/test_Conv2d/model.onnx")
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	for _, cut := range []int{1, 7, len(data) / 3, len(data) / 2, len(data) - 1} {
		if _, err := onnx.Decode(data[:cut], ""); err == nil {
			t.Errorf("model truncated to %d of %d bytes decoded without error", cut, len(data))
		}
	}
	for _, junk := range [][]byte{
		[]byte("this is not a protobuf\n"),
		{0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01},
		{},
	} {
		if _, err := onnx.Decode(junk, ""); err == nil {
			t.Errorf("junk %q decoded without error", junk)
		}
		if _, _, err := onnx.DecodeTensor(append(junk, 0xff)); err == nil {
			t.Errorf("junk %q decoded as a tensor", junk)
		}
	}
	tdir := t.TempDir()
	tp := filepath.Join(tdir, "cut.pb")
	full, _ := os.ReadFile(filepath.Join(testdataRoot, "node/test_abs/test_data_set_0/input_0.pb"))
	if err := os.WriteFile(tp, full[:len(full)-5], 0o644); err != nil {
		t.Fatal(err)
	}
	if _, _, err := onnx.LoadTensor(tp); err == nil || !strings.Contains(err.Error(), "cut.pb") {
		t.Errorf("truncated tensor file: %v", err)
	}
}

// FuzzDecode checks that no input makes the decoder panic or hang. Seeds
// are real conformance models; run with
// go test ./onnx/ -run '^$' -fuzz FuzzDecode -fuzztime 60s
func FuzzDecode(f *testing.F) {
	for _, rel := range []string{
		"pytorch-converted/test_Conv2d/model.onnx",
		"node/test_constantofshape_int_zeros/model.onnx",
		"node/test_if/model.onnx",
		"simple/test_single_relu_model/model.onnx",
		"node/test_abs/test_data_set_0/input_0.pb",
	} {
		if b, err := os.ReadFile(filepath.Join(testdataRoot, rel)); err == nil {
			f.Add(b)
		}
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		m, err := onnx.Decode(data, "")
		if err == nil && m.Graph == nil {
			t.Fatal("nil graph without error")
		}
		if tt, _, err := onnx.DecodeTensor(data); err == nil {
			if tt.Len() != len(tt.F32)+len(tt.I64) {
				t.Fatalf("tensor %v has %d+%d values", tt, len(tt.F32), len(tt.I64))
			}
		}
	})
}
