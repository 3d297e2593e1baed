package engine

import (
	"errors"
	"fmt"
	"sort"

	"heedmap/onnx"
	"heedmap/tensor"
)

// GradCAMLayer returns the name of the last 4-D activation that feeds a
// global spatial pooling: a GlobalAveragePool, or a ReduceMean over axes
// {2, 3} (or {-2, -1}) of a 4-D tensor. Grad-CAM (Selvaraju et al.,
// "Grad-CAM: Visual Explanations from Deep Networks via Gradient-based
// Localization", ICCV 2017) weights exactly this activation's channels.
// Rank is taken from the declared value_info when present and otherwise
// from the pooling op (GlobalAveragePool on image models is NCHW).
func (g *Graph) GradCAMLayer() (string, error) {
	return GradCAMLayerOf(g.model)
}

// GradCAMLayerOf is GradCAMLayer on a decoded model that need not compile
// (heedmap inspect reports it next to the unsupported nodes). It walks the
// nodes in topological order from the last; a ReduceMean's axes come from
// its attribute or from a constant second input (an initializer or a
// Constant node).
func GradCAMLayerOf(m *onnx.Model) (string, error) {
	if m == nil || m.Graph == nil {
		return "", errors.New("engine: model has no graph")
	}
	mg := m.Graph
	nodes, err := topoSort(mg)
	if err != nil {
		return "", err
	}
	declared := map[string]int{}
	for _, vis := range [][]onnx.ValueInfo{mg.ValueInfo, mg.Inputs, mg.Outputs} {
		for _, vi := range vis {
			if vi.Shape != nil {
				declared[vi.Name] = len(vi.Shape)
			}
		}
	}
	constInt := func(name string) []int64 {
		if t := mg.Initializers[name]; t != nil && t.DType == tensor.Int64 {
			return t.I64
		}
		for _, n := range mg.Nodes {
			if n.OpType == "Constant" && len(n.Outputs) == 1 && n.Outputs[0] == name {
				if a := n.Attrs["value"]; a != nil && a.Tensor != nil && a.Tensor.DType == tensor.Int64 {
					return a.Tensor.I64
				}
			}
		}
		return nil
	}
	for k := len(nodes) - 1; k >= 0; k-- {
		nd := nodes[k]
		if len(nd.Inputs) == 0 || nd.Inputs[0] == "" {
			continue
		}
		name := nd.Inputs[0]
		if r, ok := declared[name]; ok && r != 4 {
			continue
		}
		switch nd.OpType {
		case "GlobalAveragePool":
			return name, nil
		case "ReduceMean":
			axes := nd.Ints("axes")
			if axes == nil && len(nd.Inputs) > 1 && nd.Inputs[1] != "" {
				axes = constInt(nd.Inputs[1])
			}
			if spatialAxes(axes) {
				return name, nil
			}
		}
	}
	return "", errors.New("engine: no 4-D activation feeding a global average pooling (GlobalAveragePool or ReduceMean over H, W); name the layer explicitly")
}

func spatialAxes(axes []int64) bool {
	if len(axes) != 2 {
		return false
	}
	a, b := axes[0], axes[1]
	if a > b {
		a, b = b, a
	}
	return (a == 2 && b == 3) || (a == -2 && b == -1)
}

// Summary describes a model for inspection. It is built from the decoded
// model alone, so it is available even when Compile fails.
type Summary struct {
	Inputs      []onnx.ValueInfo // non-initializer graph inputs
	Outputs     []onnx.ValueInfo
	Opsets      map[string]int64
	Producer    string
	Nodes       int
	OpHistogram []OpCount // most frequent first
	// Parameters is the number of elements in all initializers.
	Parameters int64
	// Unsupported lists the nodes this runtime has no operator for.
	Unsupported []UnsupportedNode
	// GradCAMLayer is the default Grad-CAM layer (GradCAMLayerOf), or ""
	// with the reason in GradCAMErr.
	GradCAMLayer string
	GradCAMErr   error
}

// OpCount is one row of the op-type histogram.
type OpCount struct {
	OpType string
	Count  int
}

// UnsupportedNode names a node the runtime cannot compile.
type UnsupportedNode struct {
	Name, OpType, Domain string
}

func (u UnsupportedNode) String() string {
	if u.Domain != "" && u.Domain != "ai.onnx" {
		return fmt.Sprintf("%q (%s, domain %s)", u.Name, u.OpType, u.Domain)
	}
	return fmt.Sprintf("%q (%s)", u.Name, u.OpType)
}

// Describe summarises m without compiling it.
func Describe(m *onnx.Model) Summary {
	s := Summary{Opsets: map[string]int64{}, Producer: m.ProducerName}
	for d, v := range m.Opsets {
		s.Opsets[d] = v
	}
	if m.Graph == nil {
		return s
	}
	mg := m.Graph
	for _, vi := range mg.Inputs {
		if _, init := mg.Initializers[vi.Name]; !init {
			s.Inputs = append(s.Inputs, vi)
		}
	}
	s.Outputs = append(s.Outputs, mg.Outputs...)
	s.Nodes = len(mg.Nodes)
	hist := map[string]int{}
	for _, n := range mg.Nodes {
		key := n.OpType
		if n.Domain != "" && n.Domain != "ai.onnx" {
			key = n.Domain + "." + n.OpType
		}
		hist[key]++
		if _, ok := lookup(n.OpType); !ok || (n.Domain != "" && n.Domain != "ai.onnx") {
			s.Unsupported = append(s.Unsupported, UnsupportedNode{Name: n.Name, OpType: n.OpType, Domain: n.Domain})
		}
	}
	for op, c := range hist {
		s.OpHistogram = append(s.OpHistogram, OpCount{op, c})
	}
	sort.Slice(s.OpHistogram, func(i, j int) bool {
		a, b := s.OpHistogram[i], s.OpHistogram[j]
		if a.Count != b.Count {
			return a.Count > b.Count
		}
		return a.OpType < b.OpType
	})
	for _, t := range mg.Initializers {
		s.Parameters += int64(tensor.Numel(t.Shape))
	}
	s.GradCAMLayer, s.GradCAMErr = GradCAMLayerOf(m)
	return s
}
