package onnx

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"

	"google.golang.org/protobuf/proto"

	"heedmap/onnx/onnxpb"
	"heedmap/tensor"
)

// Load reads and decodes the ONNX model at path. Tensors stored as external
// data are read from files in path's directory (never outside it).
func Load(path string) (*Model, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("onnx: %w", err)
	}
	return decodeModel(data, filepath.Dir(path), path)
}

// Decode decodes an ONNX model held in memory. dir is the directory that
// external-data locations are relative to; with dir == "" a model that keeps
// tensors in external files is refused.
func Decode(data []byte, dir string) (*Model, error) {
	return decodeModel(data, dir, "model")
}

// LoadTensor reads a serialized TensorProto (for example the ONNX test data's
// input_0.pb) and returns it with the name stored in the file.
func LoadTensor(path string) (*tensor.Tensor, string, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, "", fmt.Errorf("onnx: %w", err)
	}
	d := &decoder{file: path, dir: filepath.Dir(path)}
	defer d.close()
	return d.decodeTensorBytes(data)
}

// DecodeTensor decodes a serialized TensorProto held in memory. External data
// is refused, since there is no directory to resolve it against.
func DecodeTensor(data []byte) (*tensor.Tensor, string, error) {
	d := &decoder{file: "tensor"}
	return d.decodeTensorBytes(data)
}

// decoder carries what error messages and external-data reads need.
type decoder struct {
	file string   // named in every error
	dir  string   // external-data root; "" refuses external data
	root *os.Root // opened on first use; confines reads to dir
}

func (d *decoder) close() {
	if d.root != nil {
		d.root.Close()
	}
}

func (d *decoder) errorf(format string, args ...any) error {
	return fmt.Errorf("onnx: %s: "+format, append([]any{d.file}, args...)...)
}

func decodeModel(data []byte, dir, file string) (*Model, error) {
	d := &decoder{file: file, dir: dir}
	defer d.close()
	var mp onnxpb.ModelProto
	if err := proto.Unmarshal(data, &mp); err != nil {
		return nil, d.errorf("not a valid ONNX protobuf (truncated or corrupt?): %v", err)
	}
	if mp.Graph == nil {
		return nil, d.errorf("model has no graph")
	}
	m := &Model{
		IRVersion:    mp.GetIrVersion(),
		Opsets:       make(map[string]int64),
		ProducerName: mp.GetProducerName(),
	}
	for _, op := range mp.OpsetImport {
		dom := normDomain(op.GetDomain())
		if op.GetVersion() <= 0 {
			return nil, d.errorf("opset import for domain %q has version %d", op.GetDomain(), op.GetVersion())
		}
		if _, dup := m.Opsets[dom]; dup {
			return nil, d.errorf("opset for domain %q imported twice", op.GetDomain())
		}
		m.Opsets[dom] = op.GetVersion()
	}
	if len(m.Opsets) == 0 {
		// IR version 1 and 2 files predate opset_import; the IR spec says such
		// models use opset 1 of the default domain.
		if mp.GetIrVersion() >= 3 {
			return nil, d.errorf("model declares no opset_import")
		}
		m.Opsets[""] = 1
	}
	g, err := d.graph(mp.Graph, m.Opsets)
	if err != nil {
		return nil, err
	}
	m.Graph = g
	return m, nil
}

// normDomain maps the default domain's two spellings to "".
func normDomain(s string) string {
	if s == "ai.onnx" {
		return ""
	}
	return s
}

func (d *decoder) graph(gp *onnxpb.GraphProto, opsets map[string]int64) (*Graph, error) {
	g := &Graph{
		Name:         gp.GetName(),
		Initializers: make(map[string]*tensor.Tensor, len(gp.Initializer)),
	}
	for i, tp := range gp.Initializer {
		name := tp.GetName()
		if name == "" {
			return nil, d.errorf("graph %q: initializer #%d has no name", g.Name, i)
		}
		if _, dup := g.Initializers[name]; dup {
			return nil, d.errorf("graph %q: initializer %q defined twice", g.Name, name)
		}
		t, err := d.tensor(tp)
		if err != nil {
			return nil, err
		}
		// Drop the protobuf's copy so the collector can reclaim it while
		// later initializers are converted: peak memory stays near one
		// copy of the weights rather than two.
		tp.RawData, tp.FloatData = nil, nil
		g.Initializers[name] = t
		g.InitOrder = append(g.InitOrder, name)
	}
	if len(gp.SparseInitializer) > 0 {
		return nil, d.errorf("graph %q: sparse initializer %q: sparse tensors are not supported", g.Name, gp.SparseInitializer[0].GetValues().GetName())
	}
	var err error
	if g.Inputs, err = d.valueInfos(gp.Input, "input"); err != nil {
		return nil, err
	}
	if g.Outputs, err = d.valueInfos(gp.Output, "output"); err != nil {
		return nil, err
	}
	if g.ValueInfo, err = d.valueInfos(gp.ValueInfo, "value_info"); err != nil {
		return nil, err
	}
	g.Nodes = make([]*Node, 0, len(gp.Node))
	for i, np := range gp.Node {
		n, err := d.node(np, i, opsets)
		if err != nil {
			return nil, err
		}
		g.Nodes = append(g.Nodes, n)
	}
	return g, nil
}

func (d *decoder) valueInfos(vs []*onnxpb.ValueInfoProto, what string) ([]ValueInfo, error) {
	out := make([]ValueInfo, 0, len(vs))
	for _, v := range vs {
		vi := ValueInfo{Name: v.GetName()}
		tp := v.GetType()
		switch {
		case tp == nil || tp.GetValue() == nil:
			// Type omitted: legal for value_info and for inner graphs.
		case tp.GetTensorType() != nil:
			tt := tp.GetTensorType()
			vi.ElemType = tt.GetElemType()
			vi.DType = dtypeOf(vi.ElemType) // zero for strings, complex, ...
			if sh := tt.GetShape(); sh != nil {
				vi.Shape = make([]Dim, len(sh.Dim))
				for i, dm := range sh.Dim {
					switch val := dm.GetValue().(type) {
					case *onnxpb.TensorShapeProto_Dimension_DimValue:
						if val.DimValue < 0 {
							return nil, d.errorf("%s %q: dimension %d is negative (%d)", what, vi.Name, i, val.DimValue)
						}
						vi.Shape[i] = Dim{Value: val.DimValue}
					case *onnxpb.TensorShapeProto_Dimension_DimParam:
						vi.Shape[i] = Dim{Value: -1, Param: val.DimParam}
					default:
						vi.Shape[i] = Dim{Value: -1}
					}
				}
			}
		default:
			return nil, d.errorf("%s %q: %s values are not supported (tensors only)", what, vi.Name, typeKind(tp))
		}
		out = append(out, vi)
	}
	return out, nil
}

func typeKind(tp *onnxpb.TypeProto) string {
	switch tp.GetValue().(type) {
	case *onnxpb.TypeProto_SequenceType:
		return "sequence"
	case *onnxpb.TypeProto_MapType:
		return "map"
	case *onnxpb.TypeProto_OptionalType:
		return "optional"
	case *onnxpb.TypeProto_SparseTensorType:
		return "sparse tensor"
	}
	return "non-tensor"
}

func (d *decoder) node(np *onnxpb.NodeProto, idx int, opsets map[string]int64) (*Node, error) {
	n := &Node{
		Name:    np.GetName(),
		OpType:  np.GetOpType(),
		Domain:  normDomain(np.GetDomain()),
		Inputs:  np.Input,
		Outputs: np.Output,
		Attrs:   make(map[string]*Attr, len(np.Attribute)),
	}
	label := fmt.Sprintf("node %q (#%d, %s)", n.Name, idx, n.OpType)
	if n.OpType == "" {
		return nil, d.errorf("%s has no op_type", label)
	}
	if _, ok := opsets[n.Domain]; !ok {
		return nil, d.errorf("%s uses domain %q, which the model does not import", label, np.GetDomain())
	}
	for _, ap := range np.Attribute {
		a, err := d.attr(ap, label, opsets)
		if err != nil {
			return nil, err
		}
		if _, dup := n.Attrs[a.Name]; dup {
			return nil, d.errorf("%s: attribute %q given twice", label, a.Name)
		}
		n.Attrs[a.Name] = a
	}
	return n, nil
}

func (d *decoder) attr(ap *onnxpb.AttributeProto, label string, opsets map[string]int64) (*Attr, error) {
	a := &Attr{Name: ap.GetName(), Type: AttrType(ap.GetType())}
	if a.Name == "" {
		return nil, d.errorf("%s: attribute without a name", label)
	}
	if ap.GetRefAttrName() != "" {
		return nil, d.errorf("%s: attribute %q refers to function attribute %q; functions are not supported", label, a.Name, ap.GetRefAttrName())
	}
	if a.Type == 0 {
		// IR versions before 3 had no type field; infer it from the one
		// field that is set.
		a.Type = inferAttrType(ap)
	}
	switch a.Type {
	case AttrFloat:
		a.Float = ap.GetF()
	case AttrInt:
		a.Int = ap.GetI()
	case AttrString:
		a.String = string(ap.GetS())
	case AttrTensor:
		if ap.T == nil {
			return nil, d.errorf("%s: tensor attribute %q is empty", label, a.Name)
		}
		t, err := d.tensor(ap.T)
		if err != nil {
			return nil, fmt.Errorf("%w (attribute %q of %s)", err, a.Name, label)
		}
		a.Tensor = t
	case AttrGraph:
		if ap.G == nil {
			return nil, d.errorf("%s: graph attribute %q is empty", label, a.Name)
		}
		g, err := d.graph(ap.G, opsets)
		if err != nil {
			return nil, err
		}
		a.Graph = g
	case AttrFloats:
		a.Floats = ap.GetFloats()
	case AttrInts:
		a.Ints = ap.GetInts()
	case AttrStrings:
		a.Strings = make([]string, len(ap.Strings))
		for i, s := range ap.Strings {
			a.Strings[i] = string(s)
		}
	case AttrTensors:
		for _, tp := range ap.Tensors {
			t, err := d.tensor(tp)
			if err != nil {
				return nil, fmt.Errorf("%w (attribute %q of %s)", err, a.Name, label)
			}
			a.Tensors = append(a.Tensors, t)
		}
	case AttrGraphs:
		for _, gp := range ap.Graphs {
			g, err := d.graph(gp, opsets)
			if err != nil {
				return nil, err
			}
			a.Graphs = append(a.Graphs, g)
		}
	default:
		return nil, d.errorf("%s: attribute %q has type %s, which is not supported", label, a.Name, onnxpb.AttributeProto_AttributeType(a.Type))
	}
	return a, nil
}

func inferAttrType(ap *onnxpb.AttributeProto) AttrType {
	switch {
	case ap.F != nil:
		return AttrFloat
	case ap.I != nil:
		return AttrInt
	case ap.S != nil:
		return AttrString
	case ap.T != nil:
		return AttrTensor
	case ap.G != nil:
		return AttrGraph
	case len(ap.Floats) > 0:
		return AttrFloats
	case len(ap.Ints) > 0:
		return AttrInts
	case len(ap.Strings) > 0:
		return AttrStrings
	case len(ap.Tensors) > 0:
		return AttrTensors
	case len(ap.Graphs) > 0:
		return AttrGraphs
	}
	return 0
}

func (d *decoder) decodeTensorBytes(data []byte) (*tensor.Tensor, string, error) {
	var tp onnxpb.TensorProto
	if err := proto.Unmarshal(data, &tp); err != nil {
		return nil, "", d.errorf("not a valid TensorProto (truncated or corrupt?): %v", err)
	}
	t, err := d.tensor(&tp)
	if err != nil {
		return nil, "", err
	}
	return t, tp.GetName(), nil
}

var errNoDir = errors.New("no directory to resolve external data against")
