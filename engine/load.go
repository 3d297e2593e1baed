package engine

import (
	"fmt"

	"heedmap/onnx"
)

// Load decodes the ONNX file at path and compiles it.
func Load(path string, opts ...Option) (*Graph, error) {
	m, err := onnx.Load(path)
	if err != nil {
		return nil, err
	}
	g, err := Compile(m, opts...)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return g, nil
}
