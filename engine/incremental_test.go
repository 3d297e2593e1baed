package engine

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// The reference for incremental evaluation is brute force: the same graph
// run in full (Graph.Run) on every occluded copy. The two differ only in
// the order of float summation (the incremental path multiplies patch
// columns in different GEMM blocks), so outputs must agree within
// incTol·max(1, largest |output|); 1e-5 relative is the float32 summation
// noise we expect for these depths, with headroom.
const incTol = 2e-5

// incBruteForce runs x with each rect replaced by fill through g in full.
func incBruteForce(t testing.TB, g *Graph, input, output string, x, fill *tensor.Tensor, rects []Rect) *tensor.Tensor {
	c, h, w := x.Shape[1], x.Shape[2], x.Shape[3]
	n := c * h * w
	xb := tensor.New(len(rects), c, h, w)
	for b, r := range rects {
		dst := xb.F32[b*n : (b+1)*n]
		copy(dst, x.F32)
		for k := 0; k < c; k++ {
			for y := max(r.Y0, 0); y < min(r.Y1, h); y++ {
				for xx := max(r.X0, 0); xx < min(r.X1, w); xx++ {
					dst[(k*h+y)*w+xx] = fill.F32[(k*h+y)*w+xx]
				}
			}
		}
	}
	p, err := g.Run(context.Background(), map[string]*tensor.Tensor{input: xb}, RunOptions{})
	if err != nil {
		t.Fatal(err)
	}
	y, _ := p.Value(output)
	return y
}

func incCompare(t *testing.T, what string, got, want *tensor.Tensor) {
	t.Helper()
	if !shapeEq(got.Shape, want.Shape) {
		t.Fatalf("%s: shape %v, want %v", what, got.Shape, want.Shape)
	}
	var scale, worst float64 = 1, 0
	for _, v := range want.F32 {
		scale = math.Max(scale, math.Abs(float64(v)))
	}
	at := 0
	for i := range want.F32 {
		if d := math.Abs(float64(got.F32[i] - want.F32[i])); d > worst {
			worst, at = d, i
		}
	}
	t.Logf("%s: largest difference %.3g (relative %.3g) at %d", what, worst, worst/scale, at)
	if worst > incTol*scale {
		t.Errorf("%s: element %d = %v, brute force %v (tolerance %g·%g)", what, at, got.F32[at], want.F32[at], incTol, scale)
	}
}

func incRandom(seed uint64, shape ...int) *tensor.Tensor {
	r := rand.New(rand.NewPCG(seed, 7))
	t := tensor.New(shape...)
	for i := range t.F32 {
		t.F32[i] = float32(r.NormFloat64())
	}
	return t
}

// incWindows lists patch×patch windows at the given stride (plus one
// flush with the far edge), as the occlusion package does.
func incWindows(h, w, patch, stride int) []Rect {
	origins := func(n int) []int {
		var o []int
		for x := 0; x+patch <= n; x += stride {
			o = append(o, x)
		}
		if o[len(o)-1]+patch < n {
			o = append(o, n-patch)
		}
		return o
	}
	var rs []Rect
	for _, y := range origins(h) {
		for _, x := range origins(w) {
			rs = append(rs, Rect{x, y, x + patch, y + patch})
		}
	}
	return rs
}

// TestIncrementalCompactNets: on the compact reference networks, the
// incremental outputs equal brute-force full passes for every window.
func TestIncrementalCompactNets(t *testing.T) {
	for _, name := range []string{"resnet18", "mobilenet_v2", "efficientnet_b0", "densenet121"} {
		t.Run(name, func(t *testing.T) {
			dir := filepath.Join("..", "testdata", "nets", name)
			g, err := Load(filepath.Join(dir, "model.onnx"))
			if err != nil {
				t.Fatal(err)
			}
			xb, _, err := onnx.LoadTensor(filepath.Join(dir, "input.pb"))
			if err != nil {
				t.Fatal(err)
			}
			c, h, w := xb.Shape[1], xb.Shape[2], xb.Shape[3]
			x := tensor.FromFloat32(xb.F32[:c*h*w], 1, c, h, w)
			fill := incRandom(5, 1, c, h, w)
			inc, err := NewIncremental(context.Background(), g, "input", "logits", x)
			if err != nil {
				t.Fatal(err)
			}
			for _, f := range inc.Fallbacks() {
				t.Logf("full from %s", f)
			}
			// Patch 10, stride 9 on 64²: 7×7 windows, the last flush with
			// the edge; plus windows hanging over the border (clipped).
			rects := incWindows(h, w, 10, 9)
			rects = append(rects, Rect{-3, -3, 4, 5}, Rect{w - 2, 30, w + 5, 33}, Rect{20, 20, 21, 21})
			changed := false
			for s := 0; s < len(rects); s += 13 { // odd batch sizes on purpose
				part := rects[s:min(s+13, len(rects))]
				got, err := inc.Occlude(context.Background(), fill, part)
				if err != nil {
					t.Fatal(err)
				}
				want := incBruteForce(t, g, "input", "logits", x, fill, part)
				incCompare(t, fmt.Sprintf("windows %d–%d", s, s+len(part)-1), got, want)
				changed = changed || incDiffers(want, inc.Base())
			}
			if !changed {
				t.Error("no window changed the output: the comparison proves nothing")
			}
		})
	}
}

// incDiffers reports whether some row of batch incDiffers from the single row
// base by more than float noise.
func incDiffers(batch, base *tensor.Tensor) bool {
	n := base.Len()
	for i, v := range batch.F32 {
		if math.Abs(float64(v-base.F32[i%n])) > 1e-3 {
			return true
		}
	}
	return false
}

// incHandGraph is a small graph built by hand: two convolutions, batch norm, max pooling,
// a skip connection with a depthwise branch, a channel concat, a constant
// pad, average pooling and a classifier head.
func incHandGraph(t testing.TB) *Graph {
	r := rand.New(rand.NewPCG(11, 12))
	init := map[string]*tensor.Tensor{}
	var order []string
	param := func(name string, shape ...int) string {
		p := tensor.New(shape...)
		for i := range p.F32 {
			p.F32[i] = float32(r.NormFloat64() * 0.3)
		}
		init[name], order = p, append(order, name)
		return name
	}
	ints := func(name string, v ...int64) *onnx.Attr { return &onnx.Attr{Name: name, Type: onnx.AttrInts, Ints: v} }
	intA := func(name string, v int64) *onnx.Attr { return &onnx.Attr{Name: name, Type: onnx.AttrInt, Int: v} }
	node := func(op string, ins []string, out string, attrs ...*onnx.Attr) *onnx.Node {
		n := &onnx.Node{Name: out, OpType: op, Inputs: ins, Outputs: []string{out}, Attrs: map[string]*onnx.Attr{}}
		for _, a := range attrs {
			n.Attrs[a.Name] = a
		}
		return n
	}
	bnVar := param("bn_var", 6)
	for i := range init[bnVar].F32 {
		init[bnVar].F32[i] = 0.5 + float32(math.Abs(float64(init[bnVar].F32[i])))
	}
	pads := tensor.FromInt64([]int64{0, 0, 1, 0, 0, 0, 0, 1}, 8)
	init["pads"], order = pads, append(order, "pads")
	nodes := []*onnx.Node{
		node("Conv", []string{"x", param("w1", 4, 3, 3, 3), param("b1", 4)}, "c1", ints("pads", 1, 1, 1, 1)),
		node("Relu", []string{"c1"}, "r1"),
		node("Conv", []string{"r1", param("w2", 6, 4, 3, 3)}, "c2", ints("pads", 1, 1, 1, 1), ints("strides", 2, 2)),
		node("BatchNormalization", []string{"c2", param("bn_s", 6), param("bn_b", 6), param("bn_m", 6), bnVar}, "bn"),
		node("MaxPool", []string{"bn"}, "mp", ints("kernel_shape", 3, 3), ints("strides", 2, 2), ints("pads", 1, 1, 1, 1)),
		node("Conv", []string{"mp", param("w3", 6, 6, 1, 1)}, "pw"),
		node("Conv", []string{"pw", param("w4", 6, 1, 3, 3), param("b4", 6)}, "dw", ints("pads", 2, 2, 2, 2), ints("dilations", 2, 2), intA("group", 6)),
		node("Add", []string{"dw", "mp"}, "add"),
		node("Clip", []string{"add", "", ""}, "clip"),
		node("Concat", []string{"clip", "mp"}, "cat", intA("axis", 1)),
		node("Pad", []string{"cat", "pads"}, "pad"),
		node("AveragePool", []string{"pad"}, "ap", ints("kernel_shape", 2, 2), ints("strides", 1, 1), ints("pads", 0, 1, 0, 1), intA("count_include_pad", 1)),
		node("GlobalAveragePool", []string{"ap"}, "gap"),
		node("Flatten", []string{"gap"}, "flat"),
		node("Gemm", []string{"flat", param("fc", 5, 12), param("fcb", 5)}, "y", intA("transB", 1)),
	}
	dims := func(d ...int64) []onnx.Dim {
		out := make([]onnx.Dim, len(d))
		for i, v := range d {
			out[i] = onnx.Dim{Value: v}
		}
		out[0] = onnx.Dim{Param: "N"}
		return out
	}
	m := &onnx.Model{Opsets: map[string]int64{"": 13}, Graph: &onnx.Graph{
		Nodes:        nodes,
		Inputs:       []onnx.ValueInfo{{Name: "x", DType: tensor.Float32, Shape: dims(1, 3, 20, 20)}},
		Outputs:      []onnx.ValueInfo{{Name: "y", DType: tensor.Float32}},
		Initializers: init, InitOrder: order,
	}}
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	return g
}

// TestIncrementalHandGraph checks, on incHandGraph, changed regions worked out
// by hand from the ONNX Conv/MaxPool output-position rule (output o reads
// inputs o·s − pad + t·d, t < k), and exactness against brute force.
func TestIncrementalHandGraph(t *testing.T) {
	g := incHandGraph(t)
	x := incRandom(1, 1, 3, 20, 20)
	fill := incRandom(2, 1, 3, 20, 20)
	inc, err := NewIncremental(context.Background(), g, "x", "y", x)
	if err != nil {
		t.Fatal(err)
	}
	if fb := inc.Fallbacks(); len(fb) != 0 {
		t.Errorf("unexpected full recomputation: %v", fb)
	}
	// Window rows and columns [8, 10).
	geos := inc.plan.propagate([]Rect{{8, 8, 10, 10}})
	want := map[string]Rect{
		// 3×3, pad 1: rows 8−1 … 9+1.
		"c1": {7, 7, 11, 11}, "r1": {7, 7, 11, 11},
		// 3×3, stride 2, pad 1 on rows [7, 11): 2o+1 ≥ 7 and 2o−1 ≤ 10 → o ∈ [3, 5].
		"c2": {3, 3, 6, 6}, "bn": {3, 3, 6, 6},
		// 3×3, stride 2, pad 1 on [3, 6): 2o+1 ≥ 3 and 2o−1 ≤ 5 → o ∈ [1, 3].
		"mp": {1, 1, 4, 4}, "pw": {1, 1, 4, 4},
		// 3×3 dilated 2, pad 2 on [1, 4): o+2 ≥ 1 and o−2 ≤ 3 → o ∈ [0, 5) clipped to the 5×5 map.
		"dw": {0, 0, 5, 5},
	}
	for name, r := range want {
		gm := geos[g.index[name]]
		if gm == nil || gm.chg == nil {
			t.Errorf("%s: no patch geometry", name)
			continue
		}
		if gm.chg[0] != r {
			t.Errorf("%s: changed region %+v, want %+v", name, gm.chg[0], r)
		}
	}
	// dw covers its whole 5×5 map, so add and cat change everywhere; pad
	// (1 row on top, 1 column on the right) gives rows [1, 6), columns
	// [0, 5) of 6×6; ap (2×2, stride 1, one column of padding each side,
	// output 5×7) reads rows o..o+1 and columns o−1..o, so rows [0, 5) and
	// columns [0, 6). The classifier head after global pooling is
	// recomputed in full.
	for name, r := range map[string]Rect{"add": {0, 0, 5, 5}, "cat": {0, 0, 5, 5}, "pad": {0, 1, 5, 6}, "ap": {0, 0, 6, 5}} {
		if gm := geos[g.index[name]]; gm == nil || gm.full || gm.chg[0] != r {
			t.Errorf("%s: geometry %+v, want changed %+v", name, gm, r)
		}
	}
	if gm := geos[g.index["y"]]; gm == nil || !gm.full {
		t.Error("y: want full recomputation")
	}
	// A window whose region stays partial through the concat and pad: a
	// corner pixel.
	geos = inc.plan.propagate([]Rect{{0, 0, 1, 1}})
	// c1 [0,2), c2: 2o−1 ≤ 1 → o ≤ 1 → [0,2); mp: 2o−1 ≤ 1 → [0,2); dw:
	// o−2 ≤ 1 → [0,4); add = union [0,4); cat = [0,4); pad shifts rows by 1
	// → rows [1,5), cols [0,4).
	for name, r := range map[string]Rect{"mp": {0, 0, 2, 2}, "dw": {0, 0, 4, 4}, "cat": {0, 0, 4, 4}, "pad": {0, 1, 4, 5}} {
		if gm := geos[g.index[name]]; gm == nil || gm.full || gm.chg[0] != r {
			t.Errorf("corner: %s: geometry %+v, want changed %+v", name, gm, r)
		}
	}
	rects := incWindows(20, 20, 3, 2)
	rects = append(rects, Rect{0, 0, 1, 1}, Rect{19, 19, 20, 20}, Rect{5, 0, 15, 20}, Rect{0, 0, 20, 20})
	for s := 0; s < len(rects); s += 16 {
		part := rects[s:min(s+16, len(rects))]
		got, err := inc.Occlude(context.Background(), fill, part)
		if err != nil {
			t.Fatal(err)
		}
		want := incBruteForce(t, g, "x", "y", x, fill, part)
		incCompare(t, fmt.Sprintf("windows %d–", s), got, want)
		if !incDiffers(want, inc.Base()) {
			t.Errorf("windows %d–: no window changed the output", s)
		}
	}
	// Batch of one per window too (no shared patch size).
	for _, r := range rects[:10] {
		got, err := inc.Occlude(context.Background(), fill, []Rect{r})
		if err != nil {
			t.Fatal(err)
		}
		incCompare(t, fmt.Sprint(r), got, incBruteForce(t, g, "x", "y", x, fill, []Rect{r}))
	}
}

// TestIncrementalReceptiveField checks the changed-region arithmetic against
// the standard receptive-field recursion for a stack of sliding windows
// (common practice, e.g. Araujo, Norris & Sim, "Computing Receptive Fields
// of Convolutional Neural Networks", Distill 2019):
//
//	r_out = r_in + (k − 1)·d·j_in,   j_out = j_in·s,   r_0 = j_0 = 1
//
// An input pixel p changes output o exactly when p lies in o's receptive
// field, so, away from the borders, the number of single-pixel windows
// whose changed region at layer L contains o must be r_L, and those pixels
// must be contiguous.
func TestIncrementalReceptiveField(t *testing.T) {
	type layer struct {
		op           string
		k, s, d, pad int64
	}
	stack := []layer{{"Conv", 3, 1, 1, 1}, {"Conv", 3, 2, 1, 1}, {"MaxPool", 3, 2, 1, 1}, {"Conv", 5, 1, 2, 4}, {"Conv", 2, 2, 1, 0}, {"Conv", 3, 1, 3, 3}}
	const h = 400
	var nodes []*onnx.Node
	init := map[string]*tensor.Tensor{}
	prev := "x"
	r, j := int64(1), int64(1)
	for i, l := range stack {
		out := fmt.Sprintf("v%d", i)
		n := &onnx.Node{Name: out, OpType: l.op, Outputs: []string{out}, Attrs: map[string]*onnx.Attr{
			"kernel_shape": {Name: "kernel_shape", Type: onnx.AttrInts, Ints: []int64{l.k, 1}},
			"strides":      {Name: "strides", Type: onnx.AttrInts, Ints: []int64{l.s, 1}},
			"dilations":    {Name: "dilations", Type: onnx.AttrInts, Ints: []int64{l.d, 1}},
			"pads":         {Name: "pads", Type: onnx.AttrInts, Ints: []int64{l.pad, 0, l.pad, 0}},
		}}
		n.Inputs = []string{prev}
		if l.op == "Conv" {
			w := fmt.Sprintf("w%d", i)
			init[w] = incRandom(uint64(i), 1, 1, int(l.k), 1)
			n.Inputs = append(n.Inputs, w)
		}
		nodes = append(nodes, n)
		prev = out
		r, j = r+(l.k-1)*l.d*j, j*l.s
	}
	m := &onnx.Model{Opsets: map[string]int64{"": 13}, Graph: &onnx.Graph{
		Nodes:        nodes,
		Inputs:       []onnx.ValueInfo{{Name: "x", DType: tensor.Float32, Shape: []onnx.Dim{{Value: 1}, {Value: 1}, {Value: h}, {Value: 2}}}},
		Outputs:      []onnx.ValueInfo{{Name: prev, DType: tensor.Float32}},
		Initializers: init,
	}}
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	inc, err := NewIncremental(context.Background(), g, "x", prev, incRandom(3, 1, 1, h, 2))
	if err != nil {
		t.Fatal(err)
	}
	oh := inc.plan.shapes[g.index[prev]][2]
	o := oh / 2
	first, count, last := -1, 0, -1
	for p := 0; p < h; p++ {
		gm := inc.plan.propagate([]Rect{{0, p, 1, p + 1}})[g.index[prev]]
		if gm.full {
			t.Fatalf("pixel %d: whole map changed", p)
		}
		if c := gm.chg[0]; c.Y0 <= o && o < c.Y1 {
			if first < 0 {
				first = p
			}
			if last >= 0 && p != last+1 {
				t.Errorf("receptive field of output %d is not contiguous at %d", o, p)
			}
			last = p
			count++
		}
	}
	t.Logf("r = %d, j = %d; output %d of %d reads input rows [%d, %d]", r, j, o, oh, first, last)
	if int64(count) != r {
		t.Errorf("receptive field of output %d: %d input rows, recursion gives %d", o, count, r)
	}
}

// TestIncrementalMultiplyAdds reports the multiply-adds of incremental
// occlusion against full passes; with HEEDMAP_RESNET18 (and optionally
// HEEDMAP_MOBILENETV2, HEEDMAP_EFFICIENTNETB0) pointing at full-size
// exports it uses 224² inputs, patch 16, stride 8 (729 windows).
func TestIncrementalMultiplyAdds(t *testing.T) {
	type net struct{ name, path string }
	nets := []net{}
	for _, n := range []string{"resnet18", "mobilenet_v2", "efficientnet_b0", "densenet121"} {
		nets = append(nets, net{n + " (compact, 64², patch 5, stride 2)", filepath.Join("..", "testdata", "nets", n, "model.onnx")})
	}
	for _, e := range [][2]string{{"HEEDMAP_RESNET18", "resnet18"}, {"HEEDMAP_MOBILENETV2", "mobilenet_v2"}, {"HEEDMAP_EFFICIENTNETB0", "efficientnet_b0"}} {
		if p := os.Getenv(e[0]); p != "" {
			nets = append(nets, net{e[1] + " (full size, 224², patch 16, stride 8)", p})
		}
	}
	for _, n := range nets {
		g, err := Load(n.path)
		if err != nil {
			t.Fatal(err)
		}
		in := g.Inputs()[0]
		size := 64
		patch, stride := 5, 2
		if d := in.Shape[2].Value; d > 0 {
			size = int(d)
		}
		if size == 224 {
			patch, stride = 16, 8
		}
		inc, err := NewIncremental(context.Background(), g, in.Name, g.Outputs()[0].Name, incRandom(4, 1, 3, size, size))
		if err != nil {
			t.Fatal(err)
		}
		rects := incWindows(size, size, patch, stride)
		i1, full := inc.MultiplyAdds(rects, 1)
		i16, _ := inc.MultiplyAdds(rects, 16)
		o16 := inc.orderedCost(rects, inc.Order(rects), 16)
		t.Logf("%s: %d windows; full %.3g MAC; incremental %.3g MAC (%.2f× fewer) one window at a time, %.3g (%.2f× fewer) in batches of 16, %.3g (%.2f× fewer) in batches of 16 in Order",
			n.name, len(rects), float64(full), float64(i1), float64(full)/float64(i1), float64(i16), float64(full)/float64(i16), float64(o16), float64(full)/float64(o16))
		if i1 > full || i1 > i16 || i1 > o16 {
			t.Errorf("%s: incremental plan costs more than it should: %d (batch 1), %d (batch 16), full %d", n.name, i1, i16, full)
		}
	}
}

// TestIncrementalRegionsAreSound runs occluded images through the compact
// networks in full, keeping every activation, and checks that every
// position of every spatial value that incDiffers from the unoccluded pass
// lies inside the changed rectangle the plan predicts: an independent,
// layer-by-layer check of the region arithmetic on real architectures. It
// also reports how tight the prediction is (the share of predicted
// positions that changed in some channel).
func TestIncrementalRegionsAreSound(t *testing.T) {
	for _, name := range []string{"resnet18", "mobilenet_v2", "densenet121"} {
		dir := filepath.Join("..", "testdata", "nets", name)
		g, err := Load(filepath.Join(dir, "model.onnx"))
		if err != nil {
			t.Fatal(err)
		}
		x := incRandom(21, 1, 3, 64, 64)
		fill := incRandom(22, 1, 3, 64, 64)
		inc, err := NewIncremental(context.Background(), g, "input", "logits", x)
		if err != nil {
			t.Fatal(err)
		}
		var predicted, changed int
		for _, r := range []Rect{{20, 24, 25, 29}, {0, 0, 5, 5}, {59, 40, 64, 45}} {
			occ := incOccluded(x, fill, r)
			vals, _, err := g.runKeepAll(context.Background(), "input", occ)
			if err != nil {
				t.Fatal(err)
			}
			geos := inc.plan.propagate([]Rect{r})
			for v, gm := range geos {
				if gm == nil || !inc.plan.isSpatial(v) || gm.chg == nil {
					continue
				}
				s := inc.plan.shapes[v]
				c, h, w := s[1], s[2], s[3]
				box := gm.chg[0]
				predicted += (box.X1 - box.X0) * (box.Y1 - box.Y0)
				for y := 0; y < h; y++ {
					for xx := 0; xx < w; xx++ {
						diff := false
						for ch := 0; ch < c; ch++ {
							i := (ch*h+y)*w + xx
							if vals[v].F32[i] != inc.base[v].F32[i] {
								diff = true
								break
							}
						}
						if !diff {
							continue
						}
						inside := box.X0 <= xx && xx < box.X1 && box.Y0 <= y && y < box.Y1
						if !inside {
							t.Fatalf("%s, window %+v: %q changed at (%d, %d), outside the predicted %+v", name, r, g.names[v], xx, y, box)
						}
						changed++
					}
				}
			}
		}
		t.Logf("%s: %d of %d predicted positions changed (%.0f%%)", name, changed, predicted, 100*float64(changed)/float64(predicted))
		if changed == 0 {
			t.Errorf("%s: nothing changed: the check proves nothing", name)
		}
	}
}

func incOccluded(x, fill *tensor.Tensor, r Rect) *tensor.Tensor {
	out := x.Clone()
	c, h, w := x.Shape[1], x.Shape[2], x.Shape[3]
	for k := 0; k < c; k++ {
		for y := max(r.Y0, 0); y < min(r.Y1, h); y++ {
			for xx := max(r.X0, 0); xx < min(r.X1, w); xx++ {
				out.F32[(k*h+y)*w+xx] = fill.F32[(k*h+y)*w+xx]
			}
		}
	}
	return out
}

// Rebase reuses the plan for another image and gives that image's results;
// concurrent Occlude calls on one Incremental agree with sequential ones;
// a cancelled context stops the evaluation.
func TestIncrementalRebaseConcurrentCancel(t *testing.T) {
	g := incHandGraph(t)
	x1, x2 := incRandom(31, 1, 3, 20, 20), incRandom(32, 1, 3, 20, 20)
	fill := incRandom(33, 1, 3, 20, 20)
	inc1, err := NewIncremental(context.Background(), g, "x", "y", x1)
	if err != nil {
		t.Fatal(err)
	}
	inc2, err := inc1.Rebase(context.Background(), x2)
	if err != nil {
		t.Fatal(err)
	}
	rects := incWindows(20, 20, 4, 3)
	got, err := inc2.Occlude(context.Background(), fill, rects)
	if err != nil {
		t.Fatal(err)
	}
	incCompare(t, "rebased", got, incBruteForce(t, g, "x", "y", x2, fill, rects))
	if _, err := inc1.Rebase(context.Background(), incRandom(1, 1, 3, 21, 20)); err == nil {
		t.Error("rebase to another shape: no error")
	}

	want, err := inc1.Occlude(context.Background(), fill, rects)
	if err != nil {
		t.Fatal(err)
	}
	errs := make(chan error, 4)
	for range 4 {
		go func() {
			y, err := inc1.Occlude(context.Background(), fill, rects)
			if err == nil {
				for i := range y.F32 {
					if y.F32[i] != want.F32[i] {
						err = fmt.Errorf("concurrent result incDiffers at %d", i)
						break
					}
				}
			}
			errs <- err
		}()
	}
	for range 4 {
		if err := <-errs; err != nil {
			t.Error(err)
		}
	}

	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := inc1.Occlude(ctx, fill, rects); err == nil {
		t.Error("cancelled context: no error")
	}
	if _, err := inc1.Occlude(context.Background(), incRandom(1, 1, 3, 5, 5), rects); err == nil {
		t.Error("fill of the wrong shape: no error")
	}
}

// An operator with no patch form in the spatial part (Softmax along the
// width mixes a whole row, so a patch rule would be wrong) is recomputed
// in full from that node, reported once, and the result stays exact.
func TestIncrementalFallback(t *testing.T) {
	attr := func(name string, v ...int64) *onnx.Attr { return &onnx.Attr{Name: name, Type: onnx.AttrInts, Ints: v} }
	m := &onnx.Model{Opsets: map[string]int64{"": 13}, Graph: &onnx.Graph{
		Nodes: []*onnx.Node{
			{Name: "c1", OpType: "Conv", Inputs: []string{"x", "w1"}, Outputs: []string{"c1"}, Attrs: map[string]*onnx.Attr{"pads": attr("pads", 1, 1, 1, 1)}},
			{Name: "sm", OpType: "Softmax", Inputs: []string{"c1"}, Outputs: []string{"sm"}, Attrs: map[string]*onnx.Attr{"axis": {Name: "axis", Type: onnx.AttrInt, Int: -1}}},
			{Name: "c2", OpType: "Conv", Inputs: []string{"sm", "w2"}, Outputs: []string{"c2"}, Attrs: map[string]*onnx.Attr{"pads": attr("pads", 1, 1, 1, 1)}},
			{Name: "gap", OpType: "GlobalAveragePool", Inputs: []string{"c2"}, Outputs: []string{"gap"}, Attrs: map[string]*onnx.Attr{}},
			{Name: "y", OpType: "Flatten", Inputs: []string{"gap"}, Outputs: []string{"y"}, Attrs: map[string]*onnx.Attr{}},
		},
		Inputs:       []onnx.ValueInfo{{Name: "x", DType: tensor.Float32, Shape: []onnx.Dim{{Param: "N"}, {Value: 2}, {Value: 12}, {Value: 12}}}},
		Outputs:      []onnx.ValueInfo{{Name: "y", DType: tensor.Float32}},
		Initializers: map[string]*tensor.Tensor{"w1": incRandom(41, 4, 2, 3, 3), "w2": incRandom(42, 3, 4, 3, 3)},
	}}
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	x, fill := incRandom(43, 1, 2, 12, 12), incRandom(44, 1, 2, 12, 12)
	inc, err := NewIncremental(context.Background(), g, "x", "y", x)
	if err != nil {
		t.Fatal(err)
	}
	fb := inc.Fallbacks()
	if len(fb) != 1 || !strings.Contains(fb[0], "Softmax") {
		t.Errorf("fallbacks %q, want the Softmax node", fb)
	}
	rects := incWindows(12, 12, 3, 2)
	got, err := inc.Occlude(context.Background(), fill, rects)
	if err != nil {
		t.Fatal(err)
	}
	want := incBruteForce(t, g, "x", "y", x, fill, rects)
	incCompare(t, "softmax graph", got, want)
	if !incDiffers(want, inc.Base()) {
		t.Error("no window changed the output")
	}
	if gm := inc.plan.propagate(rects[:1])[g.index["sm"]]; gm == nil || !gm.full {
		t.Error("Softmax output not recomputed in full")
	}
}

// Batches that mix windows of very different sizes (a pixel, a strip, a
// block, the whole image, one off the image that changes nothing), so a
// layer's windows fall into several box groups (incBoxes) and some have no
// box at all: every output equals brute force.
func TestIncrementalMixedBatch(t *testing.T) {
	dir := filepath.Join("..", "testdata", "nets", "resnet18")
	g, err := Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		t.Fatal(err)
	}
	hand := incHandGraph(t)
	for _, c := range []struct {
		name          string
		g             *Graph
		input, output string
		h, w          int
	}{{"compact resnet18", g, "input", "logits", 64, 64}, {"hand graph", hand, "x", "y", 20, 20}} {
		x, fill := incRandom(51, 1, 3, c.h, c.w), incRandom(52, 1, 3, c.h, c.w)
		inc, err := NewIncremental(context.Background(), c.g, c.input, c.output, x)
		if err != nil {
			t.Fatal(err)
		}
		rects := []Rect{
			{5, 6, 6, 7}, {0, 0, c.w, c.h}, {-9, -9, -2, -2}, {2, 1, 5, c.h - 1},
			{c.w - 7, c.h - 4, c.w, c.h}, {c.w / 2, c.h / 3, c.w/2 + 6, c.h/3 + 6}, {0, c.h / 2, c.w, c.h/2 + 2},
			{c.w - 3, 0, c.w + 4, 3},
		}
		got, err := inc.Occlude(context.Background(), fill, rects)
		if err != nil {
			t.Fatal(err)
		}
		want := incBruteForce(t, c.g, c.input, c.output, x, fill, rects)
		incCompare(t, c.name, got, want)
		if !incDiffers(want, inc.Base()) {
			t.Errorf("%s: no window changed the output", c.name)
		}
	}
}

// After the first batches have filled the evaluator's free lists
// (incBufs), a batch allocates far less than the patches it computes: on
// the compact ResNet-18, under a quarter of the bytes of its patch tensors
// (it allocated more than all of them when each batch made its own).
func TestIncrementalRecyclesBuffers(t *testing.T) {
	if incRace {
		t.Skip("allocation counts are meaningless under -race (sync.Pool drops items at random)")
	}
	dir := filepath.Join("..", "testdata", "nets", "resnet18")
	g, err := Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		t.Fatal(err)
	}
	x, fill := incRandom(61, 1, 3, 64, 64), incRandom(62, 1, 3, 64, 64)
	inc, err := NewIncremental(context.Background(), g, "input", "logits", x)
	if err != nil {
		t.Fatal(err)
	}
	rects := incWindows(64, 64, 5, 2)[:64]
	var patchBytes int64
	for s := 0; s < len(rects); s += 16 {
		for v, gm := range inc.plan.propagate(rects[s : s+16]) {
			if gm != nil && !gm.full && v != inc.plan.in {
				patchBytes += int64(16 * inc.plan.shapes[v][1] * gm.p * gm.q * 4)
			}
		}
	}
	run := func() {
		for s := 0; s < len(rects); s += 16 {
			if _, err := inc.Occlude(context.Background(), fill, rects[s:s+16]); err != nil {
				t.Fatal(err)
			}
		}
	}
	run()
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	before := ms.TotalAlloc
	run()
	runtime.ReadMemStats(&ms)
	alloc := int64(ms.TotalAlloc - before)
	t.Logf("4 batches: %d bytes allocated, patch tensors %d bytes", alloc, patchBytes)
	if alloc*4 > patchBytes {
		t.Errorf("4 batches allocated %d bytes, more than a quarter of their %d bytes of patches", alloc, patchBytes)
	}
}
