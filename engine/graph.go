package engine

import (
	"errors"
	"fmt"
	"sort"
	"strings"
	"sync"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

// Option configures Compile and Load.
type Option func(*config)

type config struct {
	gemm kernel.GEMM
}

// WithGEMM makes every operator use k for its matrix products.
func WithGEMM(k kernel.GEMM) Option {
	return func(c *config) { c.gemm = k }
}

// Graph is a compiled model: the nodes in a validated topological order,
// their built operators and the memory plan (the last use of every value).
// A Graph is immutable after Compile and safe for concurrent Run calls.
type Graph struct {
	model   *onnx.Model
	inputs  []onnx.ValueInfo
	outputs []onnx.ValueInfo

	names    []string       // value index → name
	index    map[string]int // value name → index
	consts   []*tensor.Tensor
	producer []int // value → node index, -1 for graph inputs and constants
	nodes    []*node

	inputIdx  []int // value index of each graph input (parallel to inputs)
	outputIdx []int
	// lastUse[v] is the index of the last node that reads v; values read by
	// no node have -1. Graph outputs are never freed.
	lastUse  []int
	isOutput []bool
	// varying[v] reports whether v depends on a graph input; values that do
	// not were folded into constants and never need gradients.
	varying []bool
	// arena recycles activation buffers across nodes and Runs (arena.go).
	arena *arena
	// team runs the graph's parallel loops: its operators' (through Env)
	// and Backward's gradient sums.
	team *team
	// scratch lends work buffers to all of the graph's operators
	// (scratch.go).
	scratch *scratch
	// fusion lists the Conv→activation pairs Run may fuse (fuse.go).
	fusion *fusionPlan
	// bitMask[v]: a backward pass may keep v as mask bits (bitmask.go).
	bitMask []bool
	// imageWise: every executed node computes each image of a batch on
	// its own, so Run may take a batch image by image (split.go).
	// constBytes totals the constants; splitPlans caches, per per-image
	// input shape, whether Run does.
	imageWise  bool
	constBytes int64
	splitFloor int64    // see splitFloorBytes; tests lower it
	splitPlans sync.Map // string → bool
}

type node struct {
	src *onnx.Node
	op  Op
	in  []int // value indices; -1 marks an omitted optional input
	out []int // -1 marks an omitted optional output
	// needIn/needOut say which forward values Backward reads (all of them
	// unless the op implements BackwardNeeder).
	needIn, needOut []bool
}

func (n *node) label() string {
	if n.src.Name != "" {
		return fmt.Sprintf("node %q (%s)", n.src.Name, n.src.OpType)
	}
	return fmt.Sprintf("%s node producing %q", n.src.OpType, strings.Join(n.src.Outputs, ","))
}

// Compile validates m and builds its operators. Every unsupported node (an
// op type with no registered builder, or a non-default domain) is listed in
// one error, followed by every node whose attributes its builder rejected.
// Constant nodes and nodes whose inputs are all constants are evaluated once
// here, so a Run only executes nodes that depend on a graph input.
func Compile(m *onnx.Model, opts ...Option) (*Graph, error) {
	if m == nil || m.Graph == nil {
		return nil, errors.New("engine: model has no graph")
	}
	cfg := config{gemm: defaultGEMM()}
	for _, o := range opts {
		o(&cfg)
	}
	opset, ok := m.Opsets[""]
	if !ok {
		opset, ok = m.Opsets["ai.onnx"]
	}
	if !ok {
		return nil, errors.New("engine: model declares no opset for the default ONNX domain")
	}
	g := &Graph{model: m, index: map[string]int{}}
	mg := m.Graph

	order, err := topoSort(mg)
	if err != nil {
		return nil, err
	}

	def := func(name string, c *tensor.Tensor) int {
		if i, ok := g.index[name]; ok {
			return i
		}
		g.index[name] = len(g.names)
		g.names = append(g.names, name)
		g.consts = append(g.consts, c)
		g.producer = append(g.producer, -1)
		g.varying = append(g.varying, false)
		return len(g.names) - 1
	}
	for _, name := range mg.InitOrder {
		if t := mg.Initializers[name]; t != nil {
			def(name, t)
		}
	}
	for name, t := range mg.Initializers { // in case InitOrder is incomplete
		def(name, t)
	}
	for _, vi := range mg.Inputs {
		if _, isInit := mg.Initializers[vi.Name]; isInit {
			continue
		}
		if _, dup := g.index[vi.Name]; dup {
			return nil, fmt.Errorf("engine: graph input %q declared twice", vi.Name)
		}
		i := def(vi.Name, nil)
		g.varying[i] = true
		g.inputs = append(g.inputs, vi)
		g.inputIdx = append(g.inputIdx, i)
	}

	// Build every supported node, collecting all problems before failing.
	var unsupported, rejected []string
	g.arena = newArena()
	g.team, g.scratch = newTeam(), new(scratch)
	env := &Env{GEMM: cfg.gemm, Opset: opset, arena: g.arena, team: g.team, scratch: g.scratch}
	built := make([]Op, len(order))
	for k, n := range order {
		if n.Domain != "" && n.Domain != "ai.onnx" {
			unsupported = append(unsupported, fmt.Sprintf("%q (%s, domain %s)", n.Name, n.OpType, n.Domain))
			continue
		}
		b, ok := lookup(n.OpType)
		if !ok {
			unsupported = append(unsupported, fmt.Sprintf("%q (%s)", n.Name, n.OpType))
			continue
		}
		op, err := b(n, env)
		if err != nil {
			rejected = append(rejected, fmt.Sprintf("node %q (%s): %v", n.Name, n.OpType, err))
			continue
		}
		useArena(op, g.arena)
		built[k] = op
	}
	if len(unsupported) > 0 || len(rejected) > 0 {
		var msg []string
		if len(unsupported) > 0 {
			msg = append(msg, fmt.Sprintf("%d unsupported node(s): %s", len(unsupported), strings.Join(unsupported, ", ")))
		}
		msg = append(msg, rejected...)
		return nil, fmt.Errorf("engine: %s", strings.Join(msg, "; "))
	}

	for k, n := range order {
		nd := &node{src: n, op: built[k], in: make([]int, len(n.Inputs)), out: make([]int, len(n.Outputs))}
		allConst, anyVarying := true, false
		for i, name := range n.Inputs {
			if name == "" {
				nd.in[i] = -1
				continue
			}
			v := g.index[name] // topoSort guarantees it exists
			nd.in[i] = v
			if g.consts[v] == nil {
				allConst = false
			}
			anyVarying = anyVarying || g.varying[v]
		}
		var folded []*tensor.Tensor
		if allConst && !anyVarying {
			in := make([]*tensor.Tensor, len(nd.in))
			for i, v := range nd.in {
				if v >= 0 {
					in[i] = g.consts[v]
				}
			}
			out, err := safeForward(nd.op, in)
			if err != nil {
				return nil, fmt.Errorf("engine: folding constant %s: %w", nd.label(), err)
			}
			if len(out) < countNonEmpty(n.Outputs) {
				return nil, fmt.Errorf("engine: folding constant %s: %d outputs, want %d", nd.label(), len(out), len(n.Outputs))
			}
			folded = out
		}
		for i, name := range n.Outputs {
			if name == "" {
				nd.out[i] = -1
				continue
			}
			var c *tensor.Tensor
			if folded != nil {
				if i < len(folded) {
					c = folded[i]
				}
				if c == nil {
					return nil, fmt.Errorf("engine: folding constant %s: output %q not produced", nd.label(), name)
				}
			}
			v := def(name, c)
			nd.out[i] = v
			if folded == nil {
				g.producer[v] = len(g.nodes)
				g.varying[v] = anyVarying
			}
		}
		if folded != nil {
			continue
		}
		nd.needIn, nd.needOut = backwardNeeds(nd, g.varying)
		g.nodes = append(g.nodes, nd)
	}

	g.isOutput = make([]bool, len(g.names))
	for _, vi := range mg.Outputs {
		v, ok := g.index[vi.Name]
		if !ok {
			return nil, fmt.Errorf("engine: graph output %q is produced by no node, input or initializer", vi.Name)
		}
		g.outputs = append(g.outputs, vi)
		g.outputIdx = append(g.outputIdx, v)
		g.isOutput[v] = true
	}
	g.lastUse = make([]int, len(g.names))
	for i := range g.lastUse {
		g.lastUse[i] = -1
	}
	for k, nd := range g.nodes {
		for _, v := range nd.in {
			if v >= 0 {
				g.lastUse[v] = k
			}
		}
	}
	g.fusion = planFusion(g)
	planBitMasks(g)
	g.planImageWise(opset)
	g.splitFloor = splitFloorBytes
	return g, nil
}

func countNonEmpty(names []string) int {
	n := 0
	for _, s := range names {
		if s != "" {
			n++
		}
	}
	return n
}

func backwardNeeds(nd *node, varying []bool) (in, out []bool) {
	in, out = make([]bool, len(nd.in)), make([]bool, len(nd.out))
	if _, ok := nd.op.(Differentiable); !ok {
		return in, out
	}
	var ii, oo []int
	if sb, ok := nd.op.(SelectiveBackward); ok {
		need := make([]bool, len(nd.in))
		for i, v := range nd.in {
			need[i] = v >= 0 && varying[v]
		}
		ii, oo = sb.BackwardNeedsFor(need)
	} else if bn, ok := nd.op.(BackwardNeeder); ok {
		ii, oo = bn.BackwardNeeds()
	} else {
		for i := range in {
			in[i] = true
		}
		for i := range out {
			out[i] = true
		}
		return in, out
	}
	for _, i := range ii {
		if i >= 0 && i < len(in) {
			in[i] = true
		}
	}
	for _, i := range oo {
		if i >= 0 && i < len(out) {
			out[i] = true
		}
	}
	return in, out
}

// topoSort orders the graph's nodes so every input is produced before it is
// read, keeping file order where the file is already valid. A name that
// nothing defines, a name defined twice and a cycle are errors naming the
// node concerned.
func topoSort(mg *onnx.Graph) ([]*onnx.Node, error) {
	defined := map[string]int{} // name → producing node index, -1 for inputs/initializers
	for name := range mg.Initializers {
		defined[name] = -1
	}
	for _, vi := range mg.Inputs {
		defined[vi.Name] = -1
	}
	for k, n := range mg.Nodes {
		for _, o := range n.Outputs {
			if o == "" {
				continue
			}
			if p, dup := defined[o]; dup {
				if p < 0 {
					return nil, fmt.Errorf("engine: node %q (%s) writes %q, which is a graph input or initializer", n.Name, n.OpType, o)
				}
				return nil, fmt.Errorf("engine: nodes %q and %q both produce %q", mg.Nodes[p].Name, n.Name, o)
			}
			defined[o] = k
		}
	}
	// Kahn's algorithm with the smallest ready file index first.
	indeg := make([]int, len(mg.Nodes))
	users := make([][]int, len(mg.Nodes))
	for k, n := range mg.Nodes {
		for _, in := range n.Inputs {
			if in == "" {
				continue
			}
			p, ok := defined[in]
			if !ok {
				return nil, fmt.Errorf("engine: node %q (%s) reads %q, which no node, graph input or initializer defines", n.Name, n.OpType, in)
			}
			if p >= 0 {
				indeg[k]++
				users[p] = append(users[p], k)
			}
		}
	}
	var ready []int
	for k := range mg.Nodes {
		if indeg[k] == 0 {
			ready = append(ready, k)
		}
	}
	order := make([]*onnx.Node, 0, len(mg.Nodes))
	for len(ready) > 0 {
		sort.Ints(ready)
		k := ready[0]
		ready = ready[1:]
		order = append(order, mg.Nodes[k])
		for _, u := range users[k] {
			indeg[u]--
			if indeg[u] == 0 {
				ready = append(ready, u)
			}
		}
	}
	if len(order) < len(mg.Nodes) {
		var stuck []string
		for k, n := range mg.Nodes {
			if indeg[k] > 0 {
				stuck = append(stuck, fmt.Sprintf("%q (%s)", n.Name, n.OpType))
			}
		}
		return nil, fmt.Errorf("engine: cycle among nodes %s", strings.Join(stuck, ", "))
	}
	return order, nil
}

// Inputs returns the graph inputs that are not initializers.
func (g *Graph) Inputs() []onnx.ValueInfo { return append([]onnx.ValueInfo(nil), g.inputs...) }

// Outputs returns the graph outputs.
func (g *Graph) Outputs() []onnx.ValueInfo { return append([]onnx.ValueInfo(nil), g.outputs...) }

// Model returns the model the graph was compiled from.
func (g *Graph) Model() *onnx.Model { return g.model }

// HasValue reports whether name is a value of the graph (input, initializer
// or node output).
func (g *Graph) HasValue(name string) bool {
	_, ok := g.index[name]
	return ok
}
