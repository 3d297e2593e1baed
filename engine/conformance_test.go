package engine

// ONNX operator conformance: every model of the ONNX project's own backend
// test data (Debian libonnx-testdata: node, pytorch-converted,
// pytorch-operator, simple) is compiled and run on its recorded inputs, and
// the outputs are compared with the recorded outputs.
//
// A case is
//   - run and must pass when every node's op type is registered and its
//     declared inputs/outputs are types the runtime represents;
//   - skipped, with the reason, when it uses an unregistered op type, a
//     value kind the decoder does not represent (strings, sequences,
//     optionals, maps), or float16/bfloat16 values (the runtime computes
//     in float32, so results would differ by half-precision rounding);
//   - skipped only if listed in conformanceExcluded otherwise: a known,
//     explained limitation of a supported op. A listed case that starts
//     passing fails the test, so the list cannot go stale.
//
// Regenerate CONFORMANCE.md (repository root) with
//
//	go test ./engine -run TestConformance -args -write-conformance

import (
	"context"
	"flag"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"sort"
	"strings"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

var writeConformance = flag.Bool("write-conformance", false, "rewrite ../CONFORMANCE.md from this conformance run")

const conformanceRoot = "/usr/share/libonnx-testdata/data"

var conformanceSuites = []string{"node", "pytorch-converted", "pytorch-operator", "simple"}

// Tolerance for float outputs: |got − want| ≤ confAtol + confRtol·|want|.
// rtol = 1e-3 is the ONNX backend test default (onnx/backend/test/case/
// node/__init__.py in ONNX 1.12 passes rtol=1e-3, atol=1e-7 to
// numpy.testing.assert_allclose). atol is the ONNX value too. Integer and
// boolean outputs must match exactly; NaN matches NaN as in assert_allclose.
const (
	confRtol = 1e-3
	confAtol = 1e-7
)

// conformanceExcluded maps "suite/test" to why a case whose ops are all
// registered is not expected to pass. Keep every entry explained.
var conformanceExcluded = map[string]string{
	// NN ops (core engine) support 1-D and 2-D windows only: image
	// classifiers are 2-D; volumetric models are out of scope.
	"node/test_averagepool_3d_default":                        reason3D,
	"node/test_maxpool_3d_default":                            reason3D,
	"pytorch-converted/test_AvgPool3d":                        reason3D,
	"pytorch-converted/test_AvgPool3d_stride":                 reason3D,
	"pytorch-converted/test_AvgPool3d_stride1_pad0_gpu_input": reason3D,
	"pytorch-converted/test_Conv3d":                           reason3D,
	"pytorch-converted/test_Conv3d_dilated":                   reason3D,
	"pytorch-converted/test_Conv3d_dilated_strided":           reason3D,
	"pytorch-converted/test_Conv3d_groups":                    reason3D,
	"pytorch-converted/test_Conv3d_no_bias":                   reason3D,
	"pytorch-converted/test_Conv3d_stride":                    reason3D,
	"pytorch-converted/test_Conv3d_stride_padding":            reason3D,
	"pytorch-converted/test_MaxPool3d":                        reason3D,
	"pytorch-converted/test_MaxPool3d_stride":                 reason3D,
	"pytorch-converted/test_MaxPool3d_stride_padding":         reason3D,
	// Training-mode semantics: the runtime explains trained models in
	// inference mode; batch statistics and random dropout masks are not
	// implemented (the builders reject them with a message).
	"node/test_batchnorm_epsilon_training_mode": reasonTraining,
	"node/test_batchnorm_example_training_mode": reasonTraining,
	"node/test_training_dropout":                reasonTraining,
	"node/test_training_dropout_default":        reasonTraining,
	"node/test_training_dropout_default_mask":   reasonTraining,
	"node/test_training_dropout_mask":           reasonTraining,
	// MaxPool on integer (uint8) images: pools are float32 only.
	"node/test_maxpool_2d_uint8": "MaxPool on integer tensors is not implemented (float32 only)",
	// MaxPool's optional Indices output in column-major order.
	"node/test_maxpool_with_argmax_2d_precomputed_strides": "MaxPool Indices with storage_order=1 (column-major) is not implemented",
}

const (
	reason3D       = "3-D (volumetric) Conv/pooling windows are not implemented; only 1-D and 2-D"
	reasonTraining = "training mode (batch statistics, random dropout) is not implemented; inference only"
)

// confCase is the outcome of one conformance case.
type confCase struct {
	id     string // suite/test
	ops    []string
	status string // "pass", "fail", "skip"
	reason string
}

func TestConformance(t *testing.T) {
	if _, err := os.Stat(filepath.Join(conformanceRoot, "node")); err != nil {
		t.Skipf("ONNX conformance data not installed (Debian libonnx-testdata): %v", err)
	}
	var cases []confCase
	for _, suite := range conformanceSuites {
		dirs, err := filepath.Glob(filepath.Join(conformanceRoot, suite, "*"))
		if err != nil {
			t.Fatal(err)
		}
		sort.Strings(dirs)
		for _, dir := range dirs {
			if _, err := os.Stat(filepath.Join(dir, "model.onnx")); err != nil {
				continue
			}
			c := runConformanceCase(suite, dir)
			if reason, ok := conformanceExcluded[c.id]; ok {
				if c.status == "pass" {
					t.Errorf("%s is listed as excluded (%s) but passes: remove it from conformanceExcluded", c.id, reason)
				} else if c.status == "fail" {
					c.status, c.reason = "skip", "excluded: "+reason
				}
			}
			if c.status == "fail" {
				t.Errorf("%s [%s]: %s", c.id, strings.Join(c.ops, ","), c.reason)
			}
			cases = append(cases, c)
		}
	}
	pass, fail, skip := confTally(cases)
	t.Logf("conformance: %d cases, %d pass, %d fail, %d skipped", len(cases), pass, fail, skip)
	if *writeConformance {
		if err := os.WriteFile(filepath.Join("..", "CONFORMANCE.md"), []byte(conformanceReport(cases)), 0o644); err != nil {
			t.Fatal(err)
		}
	}
}

// elemTypeNames names ONNX element types the runtime does not compute in.
var unrepresented = map[int32]string{
	10: "float16 values (the runtime computes in float32)",
	16: "bfloat16 values (the runtime computes in float32)",
	8:  "string values",
}

var decoderUnsupported = regexp.MustCompile(`(sequence|map|optional|sparse tensor) values are not supported|element type \w+ is not supported|sparse tensors are not supported`)

func runConformanceCase(suite, dir string) confCase {
	c := confCase{id: suite + "/" + filepath.Base(dir)}
	m, err := onnx.Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		if s := decoderUnsupported.FindString(err.Error()); s != "" {
			c.status, c.reason = "skip", "decoder: "+s
			return c
		}
		c.status, c.reason = "fail", fmt.Sprintf("load: %v", err)
		return c
	}
	seen := map[string]bool{}
	var missing []string
	for _, n := range m.Graph.Nodes {
		op := n.OpType
		if n.Domain != "" && n.Domain != "ai.onnx" {
			op = n.Domain + "." + n.OpType
		}
		if !seen[op] {
			seen[op] = true
			c.ops = append(c.ops, op)
			if _, ok := lookup(n.OpType); !ok || op != n.OpType {
				missing = append(missing, op)
			}
		}
	}
	sort.Strings(c.ops)
	if len(missing) > 0 {
		sort.Strings(missing)
		c.status, c.reason = "skip", "unsupported op: "+strings.Join(missing, ", ")
		return c
	}
	for _, vi := range append(append([]onnx.ValueInfo(nil), m.Graph.Inputs...), m.Graph.Outputs...) {
		if why, bad := unrepresented[vi.ElemType]; bad {
			c.status, c.reason = "skip", why
			return c
		}
	}
	g, err := Compile(m)
	if err != nil {
		c.status, c.reason = "fail", fmt.Sprintf("compile: %v", err)
		return c
	}
	sets, _ := filepath.Glob(filepath.Join(dir, "test_data_set_*"))
	sort.Strings(sets)
	if len(sets) == 0 {
		c.status, c.reason = "fail", "no test_data_set directories"
		return c
	}
	for _, set := range sets {
		if err := runConformanceSet(g, set); err != nil {
			c.status, c.reason = "fail", fmt.Sprintf("%s: %v", filepath.Base(set), err)
			return c
		}
	}
	c.status = "pass"
	return c
}

// loadNumbered loads prefix_0.pb, prefix_1.pb, ... from dir.
func loadNumbered(dir, prefix string) ([]*tensor.Tensor, []string, error) {
	var ts []*tensor.Tensor
	var names []string
	for i := 0; ; i++ {
		p := filepath.Join(dir, fmt.Sprintf("%s_%d.pb", prefix, i))
		if _, err := os.Stat(p); err != nil {
			return ts, names, nil
		}
		t, name, err := onnx.LoadTensor(p)
		if err != nil {
			return nil, nil, err
		}
		ts = append(ts, t)
		names = append(names, name)
	}
}

func runConformanceSet(g *Graph, set string) error {
	ins, inNames, err := loadNumbered(set, "input")
	if err != nil {
		return err
	}
	wants, _, err := loadNumbered(set, "output")
	if err != nil {
		return err
	}
	gin := g.Inputs()
	if len(ins) != len(gin) {
		return fmt.Errorf("%d input files for %d graph inputs", len(ins), len(gin))
	}
	feed := map[string]*tensor.Tensor{}
	for i, vi := range gin {
		feed[vi.Name] = ins[i]
		_ = inNames
	}
	p, err := g.Run(context.Background(), feed, RunOptions{})
	if err != nil {
		return fmt.Errorf("run: %v", err)
	}
	gout := g.Outputs()
	if len(wants) != len(gout) {
		return fmt.Errorf("%d output files for %d graph outputs", len(wants), len(gout))
	}
	for i, vi := range gout {
		got, ok := p.Value(vi.Name)
		if !ok {
			return fmt.Errorf("output %q not produced", vi.Name)
		}
		if err := conformanceCompare(got, wants[i]); err != nil {
			return fmt.Errorf("output %q: %v", vi.Name, err)
		}
	}
	return nil
}

// conformanceCompare checks dtype, shape and values.
func conformanceCompare(got, want *tensor.Tensor) error {
	if got.DType != want.DType {
		return fmt.Errorf("dtype %s, want %s", got.DType, want.DType)
	}
	if !shapeEq(got.Shape, want.Shape) {
		return fmt.Errorf("shape %v, want %v", got.Shape, want.Shape)
	}
	if want.DType == tensor.Float32 {
		worst, at := 0.0, -1
		for i, w := range want.F32 {
			a, b := float64(got.F32[i]), float64(w)
			if math.IsNaN(a) && math.IsNaN(b) || a == b {
				continue
			}
			if d := math.Abs(a - b); !(d <= confAtol+confRtol*math.Abs(b)) {
				if ex := d / (confAtol + confRtol*math.Abs(b)); math.IsNaN(ex) || ex > worst || at < 0 {
					worst, at = ex, i
				}
			}
		}
		if at >= 0 {
			return fmt.Errorf("element %d = %g, want %g (outside |d| ≤ %g + %g·|want|)", at, got.F32[at], want.F32[at], confAtol, confRtol)
		}
		return nil
	}
	for i, w := range want.I64 {
		if got.I64[i] != w {
			return fmt.Errorf("element %d = %d, want %d", i, got.I64[i], w)
		}
	}
	return nil
}

// conformanceReport renders CONFORMANCE.md.
// confTally counts the cases that passed, failed and were skipped.
func confTally(cases []confCase) (pass, fail, skip int) {
	for _, c := range cases {
		switch c.status {
		case "pass":
			pass++
		case "fail":
			fail++
		default:
			skip++
		}
	}
	return pass, fail, skip
}

func conformanceReport(cases []confCase) string {
	type row struct{ total, pass, fail, skip int }
	perOp := map[string]*row{}
	for _, c := range cases {
		for _, op := range c.ops {
			r := perOp[op]
			if r == nil {
				r = &row{}
				perOp[op] = r
			}
			r.total++
			switch c.status {
			case "pass":
				r.pass++
			case "fail":
				r.fail++
			default:
				r.skip++
			}
		}
	}
	var b strings.Builder
	pass, fail, skip := confTally(cases)
	fmt.Fprintf(&b, "# ONNX conformance\n\n")
	fmt.Fprintf(&b, "Generated by `go test ./engine -run TestConformance -args -write-conformance` from the ONNX backend test data in Debian `libonnx-testdata` (%s: %s). Do not edit by hand.\n\n", conformanceRoot, strings.Join(conformanceSuites, ", "))
	fmt.Fprintf(&b, "Float outputs must satisfy |got − want| ≤ %g + %g·|want| (the ONNX backend tests' assert_allclose tolerance); integer and boolean outputs must match exactly.\n\n", confAtol, confRtol)
	fmt.Fprintf(&b, "**%d cases: %d pass, %d fail, %d skipped.**\n\n", len(cases), pass, fail, skip)
	var supported, unsupported []string
	for op := range perOp {
		if _, ok := lookup(op); ok {
			supported = append(supported, op)
		} else {
			unsupported = append(unsupported, op)
		}
	}
	sort.Strings(supported)
	sort.Strings(unsupported)
	fmt.Fprintf(&b, "## Registered op types\n\nA case counts for every op type its model uses, so a model with several op types appears in several rows.\n\n")
	fmt.Fprintf(&b, "| op | cases | pass | fail | skipped |\n|---|---:|---:|---:|---:|\n")
	for _, op := range supported {
		r := perOp[op]
		fmt.Fprintf(&b, "| %s | %d | %d | %d | %d |\n", op, r.total, r.pass, r.fail, r.skip)
	}
	fmt.Fprintf(&b, "\n## Skipped and failing cases\n\n")
	byReason := map[string][]string{}
	var reasons []string
	for _, c := range cases {
		if c.status == "pass" {
			continue
		}
		key := c.reason
		if c.status == "fail" {
			key = "FAIL"
		}
		if _, ok := byReason[key]; !ok {
			reasons = append(reasons, key)
		}
		byReason[key] = append(byReason[key], c.id)
	}
	sort.Slice(reasons, func(i, j int) bool {
		if len(byReason[reasons[i]]) != len(byReason[reasons[j]]) {
			return len(byReason[reasons[i]]) > len(byReason[reasons[j]])
		}
		return reasons[i] < reasons[j]
	})
	fmt.Fprintf(&b, "| reason | cases | tests |\n|---|---:|---|\n")
	for _, r := range reasons {
		ids := byReason[r]
		fmt.Fprintf(&b, "| %s | %d | %s |\n", strings.ReplaceAll(r, "|", "\\|"), len(ids), strings.Join(ids, ", "))
	}
	fmt.Fprintf(&b, "\n## Op types without a builder\n\n%s\n", strings.Join(unsupported, ", "))
	return b.String()
}
