// Package onnx decodes ONNX model files (the open standard's protobuf
// encoding, onnx.proto) into plain Go types the runtime compiles.
//
// Decoding never trusts the file: sizes, dims and data lengths are checked
// before anything is allocated, and every problem is reported with the
// model path and the node or tensor it concerns.
package onnx

import "heedmap/tensor"

// Model is a decoded ONNX model.
type Model struct {
	IRVersion    int64
	Opsets       map[string]int64 // domain ("" = ai.onnx) → opset version
	ProducerName string
	Graph        *Graph
}

// Graph is a decoded ONNX graph. Nodes are in file order (ONNX requires a
// topological order; the runtime re-checks it).
type Graph struct {
	Name         string
	Nodes        []*Node
	Inputs       []ValueInfo // graph inputs, including any that are also initializers
	Outputs      []ValueInfo
	ValueInfo    []ValueInfo               // optional intermediate shapes from the file
	Initializers map[string]*tensor.Tensor // by name; Constant nodes stay nodes
	InitOrder    []string                  // initializer names in file order
}

// ValueInfo names a value and its declared element type and shape.
type ValueInfo struct {
	Name     string
	ElemType int32 // onnx TensorProto.DataType code
	DType    tensor.DType
	Shape    []Dim // nil when the file declares no shape
}

// Dim is one dimension of a declared shape: a fixed Value, or a symbolic
// Param (e.g. "batch"), or unknown (Value < 0 and Param == "").
type Dim struct {
	Value int64
	Param string
}

// Node is one operator application.
type Node struct {
	Name    string
	OpType  string
	Domain  string
	Inputs  []string // "" marks an omitted optional input
	Outputs []string
	Attrs   map[string]*Attr
}

// AttrType mirrors onnx AttributeProto.AttributeType.
type AttrType int32

const (
	AttrFloat   AttrType = 1
	AttrInt     AttrType = 2
	AttrString  AttrType = 3
	AttrTensor  AttrType = 4
	AttrGraph   AttrType = 5
	AttrFloats  AttrType = 6
	AttrInts    AttrType = 7
	AttrStrings AttrType = 8
	AttrTensors AttrType = 9
	AttrGraphs  AttrType = 10
)

// Attr is a decoded node attribute.
type Attr struct {
	Name    string
	Type    AttrType
	Float   float32
	Int     int64
	String  string
	Tensor  *tensor.Tensor
	Graph   *Graph
	Floats  []float32
	Ints    []int64
	Strings []string
	Tensors []*tensor.Tensor
	Graphs  []*Graph
}

// Int returns the integer attribute name, or def when absent.
func (n *Node) Int(name string, def int64) int64 {
	if a, ok := n.Attrs[name]; ok {
		return a.Int
	}
	return def
}

// Float returns the float attribute name, or def when absent.
func (n *Node) Float(name string, def float32) float32 {
	if a, ok := n.Attrs[name]; ok {
		return a.Float
	}
	return def
}

// String returns the string attribute name, or def when absent.
func (n *Node) String(name string, def string) string {
	if a, ok := n.Attrs[name]; ok {
		return a.String
	}
	return def
}

// Ints returns the integer-list attribute name, or nil when absent.
func (n *Node) Ints(name string) []int64 {
	if a, ok := n.Attrs[name]; ok {
		return a.Ints
	}
	return nil
}

// Floats returns the float-list attribute name, or nil when absent.
func (n *Node) Floats(name string) []float32 {
	if a, ok := n.Attrs[name]; ok {
		return a.Floats
	}
	return nil
}

// Has reports whether the node carries attribute name.
func (n *Node) Has(name string) bool {
	_, ok := n.Attrs[name]
	return ok
}
