package onnx_test

import (
	"os"
	"path/filepath"
	"testing"

	"heedmap/onnx"
)

// BenchmarkDecode decodes a whole model from memory (protobuf parse plus
// conversion of every initializer). It uses the full-size ResNet-18 named by
// HEEDMAP_RESNET18 (testdata/reference/export_nets.py --full) when set,
// else the compact ConvNeXt of testdata/nets.
func BenchmarkDecode(b *testing.B) {
	path := os.Getenv("HEEDMAP_RESNET18")
	if path == "" {
		path = filepath.Join("..", "testdata", "nets", "convnext_tiny", "model.onnx")
	}
	data, err := os.ReadFile(path)
	if err != nil {
		b.Skip(err)
	}
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := onnx.Decode(data, filepath.Dir(path)); err != nil {
			b.Fatal(err)
		}
	}
}
