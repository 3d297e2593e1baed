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
	declared := map[string]int{}
	for _, vis := range [][]onnx.ValueInfo{g.model.Graph.ValueInfo, g.model.Graph.Inputs, g.model.Graph.Outputs} {
		for _, vi := range vis {
			if vi.Shape != nil {
				declared[vi.Name] = len(vi.Shape)
			}
		}
	}
	for k := len(g.nodes) - 1; k >= 0; k-- {
		nd := g.nodes[k]
		if len(nd.in) == 0 || nd.in[0] < 0 {
			continue
		}
		name := g.names[nd.in[0]]
		if r, ok := declared[name]; ok && r != 4 {
			continue
		}
		switch nd.src.OpType {
		case "GlobalAveragePool":
			return name, nil
		case "ReduceMean":
			axes := nd.src.Ints("axes")
			if axes == nil && len(nd.in) > 1 && nd.in[1] >= 0 {
				if c := g.consts[nd.in[1]]; c != nil && c.DType == tensor.Int64 {
					axes = c.I64
				}
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
	return s
}
