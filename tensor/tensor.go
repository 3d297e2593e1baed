// Package tensor holds the plain dense tensor type shared by the ONNX decoder,
// the runtime and the attribution methods.
//
// A Tensor is row-major (C order). Image batches are NCHW unless a caller says
// otherwise. Float data lives in F32; integer and boolean data (ONNX INT64,
// INT32, INT8, UINT8, BOOL, ...) live in I64, booleans as 0 or 1. Exactly one
// of the two slices is used, chosen by DType.
package tensor

import (
	"fmt"
	"strings"
)

// DType is the element type of a Tensor.
type DType uint8

const (
	Float32 DType = iota + 1
	Int64
	Bool
)

func (d DType) String() string {
	switch d {
	case Float32:
		return "float32"
	case Int64:
		return "int64"
	case Bool:
		return "bool"
	}
	return fmt.Sprintf("dtype(%d)", uint8(d))
}

// Tensor is a dense row-major array.
type Tensor struct {
	DType DType
	Shape []int
	F32   []float32 // used when DType == Float32
	I64   []int64   // used when DType == Int64 or Bool
}

// New returns a zero float32 tensor of the given shape.
func New(shape ...int) *Tensor {
	return &Tensor{DType: Float32, Shape: append([]int(nil), shape...), F32: make([]float32, Numel(shape))}
}

// NewInt64 returns a zero int64 tensor of the given shape.
func NewInt64(shape ...int) *Tensor {
	return &Tensor{DType: Int64, Shape: append([]int(nil), shape...), I64: make([]int64, Numel(shape))}
}

// FromFloat32 wraps data (not copied) as a float32 tensor. It panics if the
// length does not match the shape, which is a programming error.
func FromFloat32(data []float32, shape ...int) *Tensor {
	if len(data) != Numel(shape) {
		panic(fmt.Sprintf("tensor: %d values for shape %v", len(data), shape))
	}
	return &Tensor{DType: Float32, Shape: append([]int(nil), shape...), F32: data}
}

// FromInt64 wraps data (not copied) as an int64 tensor.
func FromInt64(data []int64, shape ...int) *Tensor {
	if len(data) != Numel(shape) {
		panic(fmt.Sprintf("tensor: %d values for shape %v", len(data), shape))
	}
	return &Tensor{DType: Int64, Shape: append([]int(nil), shape...), I64: data}
}

// Numel is the number of elements of a shape; a scalar (empty shape) has one.
func Numel(shape []int) int {
	n := 1
	for _, d := range shape {
		n *= d
	}
	return n
}

// Len is the number of elements of t.
func (t *Tensor) Len() int { return Numel(t.Shape) }

// Clone returns a deep copy.
func (t *Tensor) Clone() *Tensor {
	c := &Tensor{DType: t.DType, Shape: append([]int(nil), t.Shape...)}
	if t.F32 != nil {
		c.F32 = append([]float32(nil), t.F32...)
	}
	if t.I64 != nil {
		c.I64 = append([]int64(nil), t.I64...)
	}
	return c
}

// String gives dtype and shape, e.g. "float32[1 3 224 224]".
func (t *Tensor) String() string {
	parts := make([]string, len(t.Shape))
	for i, d := range t.Shape {
		parts[i] = fmt.Sprint(d)
	}
	return t.DType.String() + "[" + strings.Join(parts, " ") + "]"
}
