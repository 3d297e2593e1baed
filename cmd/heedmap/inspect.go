package main

import (
	"context"
	"fmt"
	"io"
	"sort"
	"strconv"
	"strings"

	"heedmap/engine"
	"heedmap/onnx"
)

func cmdInspect(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := newFlagSet("inspect", stderr)
	help := func(w io.Writer) {
		fmt.Fprint(w, `Usage: heedmap inspect M.onnx

Describes an ONNX model without running it: producer, opsets, inputs and
outputs with shapes, parameter count, operator histogram, whether this
runtime supports every node (listing each unsupported node by name and
operator type), and the layer Grad-CAM would use by default.

Example:
  heedmap inspect testdata/demo/shortcut.onnx

Exit codes:
  0    described, and every node is supported
  1    described, but some nodes are unsupported or the model does not compile
  2    usage error or the file is not a readable ONNX model
`)
	}
	if code, done := parse(fs, args, help, stdout, stderr); done {
		return code
	}
	if fs.NArg() != 1 {
		fmt.Fprintln(stderr, "heedmap inspect: need exactly one model file; see 'heedmap inspect --help'")
		return exitUsage
	}
	path := fs.Arg(0)
	m, err := onnx.Load(path)
	if err != nil {
		fmt.Fprintf(stderr, "heedmap inspect: %v\n", err)
		return exitUsage
	}
	s := engine.Describe(m)
	fmt.Fprintf(stdout, "model:      %s\n", path)
	if s.Producer != "" {
		fmt.Fprintf(stdout, "producer:   %s\n", s.Producer)
	}
	var ops []string
	for d, v := range s.Opsets {
		if d == "" {
			d = "ai.onnx"
		}
		ops = append(ops, fmt.Sprintf("%s %d", d, v))
	}
	sort.Strings(ops)
	fmt.Fprintf(stdout, "opsets:     %s\n", strings.Join(ops, ", "))
	for _, vi := range s.Inputs {
		fmt.Fprintf(stdout, "input:      %s %s\n", vi.Name, shapeString(vi))
	}
	for _, vi := range s.Outputs {
		fmt.Fprintf(stdout, "output:     %s %s\n", vi.Name, shapeString(vi))
	}
	fmt.Fprintf(stdout, "parameters: %d\nnodes:      %d\n", s.Parameters, s.Nodes)
	var hist []string
	for _, h := range s.OpHistogram {
		hist = append(hist, fmt.Sprintf("%s×%d", h.OpType, h.Count))
	}
	fmt.Fprintf(stdout, "operators:  %s\n", strings.Join(hist, " "))
	if s.GradCAMErr == nil {
		fmt.Fprintf(stdout, "grad-cam:   default layer %s\n", s.GradCAMLayer)
	} else {
		fmt.Fprintf(stdout, "grad-cam:   no default layer (%v); pass --layer\n", s.GradCAMErr)
	}
	if len(s.Unsupported) > 0 {
		fmt.Fprintf(stdout, "unsupported: %d node(s):\n", len(s.Unsupported))
		for _, u := range s.Unsupported {
			fmt.Fprintf(stdout, "  %s\n", u)
		}
		return exitFailed
	}
	if _, err := engine.Compile(m); err != nil {
		fmt.Fprintf(stdout, "compile:    FAILED: %v\n", err)
		return exitFailed
	}
	fmt.Fprintln(stdout, "support:    every node is supported")
	return exitOK
}

func shapeString(vi onnx.ValueInfo) string {
	if vi.Shape == nil {
		return "(shape not declared)"
	}
	d := make([]string, len(vi.Shape))
	for i, x := range vi.Shape {
		switch {
		case x.Param != "":
			d[i] = x.Param
		case x.Value >= 0:
			d[i] = strconv.FormatInt(x.Value, 10)
		default:
			d[i] = "?"
		}
	}
	return fmt.Sprintf("%s [%s]", vi.DType, strings.Join(d, ", "))
}
