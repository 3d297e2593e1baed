// Command gorgonia-check reproduces a correctness defect of the
// gorgonia v0.9.18 + onnx-go v0.5.0 runtime that heedmap's own engine
// replaces: running the same ResNet-18 twice on the same input gives
// different logits, because the Gemm operator accumulates into its bias
// initializer. It also reports whether each reference network loads.
//
// It is a separate Go module so heedmap itself never depends on gorgonia.
// Run from the repository root:
//
//	cd bench/gorgonia && go run . ../../testdata/nets
package main

import (
	"fmt"
	"math"
	"os"
	"path/filepath"

	"heedmap/onnx"

	onnxgo "github.com/owulveryck/onnx-go"
	"github.com/owulveryck/onnx-go/backend/x/gorgonnx"
	gtensor "gorgonia.org/tensor"
)

func main() {
	dir := "../../testdata/nets"
	if len(os.Args) > 1 {
		dir = os.Args[1]
	}
	nets, _ := filepath.Glob(filepath.Join(dir, "*", "model.onnx"))
	for _, path := range nets {
		name := filepath.Base(filepath.Dir(path))
		if err := check(filepath.Dir(path)); err != nil {
			fmt.Printf("%-16s %v\n", name, err)
		}
	}
}

func check(dir string) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("panic: %v", r)
		}
	}()
	b, err := os.ReadFile(filepath.Join(dir, "model.onnx"))
	if err != nil {
		return err
	}
	x, _, err := onnx.LoadTensor(filepath.Join(dir, "input.pb"))
	if err != nil {
		return err
	}
	want, _, err := onnx.LoadTensor(filepath.Join(dir, "logits.pb"))
	if err != nil {
		return err
	}
	backend := gorgonnx.NewGraph()
	m := onnxgo.NewModel(backend)
	if err := m.UnmarshalBinary(b); err != nil {
		return fmt.Errorf("load: %v", err)
	}
	// Batch 1 (the first image of the golden batch), the shape an
	// attribution method runs most.
	per := len(x.F32) / x.Shape[0]
	shape := append([]int{1}, x.Shape[1:]...)
	classes := len(want.F32) / want.Shape[0]
	var diffs []float64
	for run := 0; run < 3; run++ {
		in := gtensor.New(gtensor.WithShape(shape...), gtensor.WithBacking(append([]float32(nil), x.F32[:per]...)))
		if err := m.SetInput(0, in); err != nil {
			return fmt.Errorf("set input: %v", err)
		}
		if err := backend.Run(); err != nil {
			return fmt.Errorf("run %d: %v", run+1, err)
		}
		outs, err := m.GetOutputTensors()
		if err != nil {
			return fmt.Errorf("run %d outputs: %v", run+1, err)
		}
		got := outs[0].Data().([]float32)
		var d float64
		for i := range want.F32[:classes] {
			d = math.Max(d, math.Abs(float64(got[i]-want.F32[i])))
		}
		diffs = append(diffs, d)
	}
	fmt.Printf("%-16s batch 1: max |logit - PyTorch| on runs 1, 2, 3: %.3g, %.3g, %.3g\n", filepath.Base(dir), diffs[0], diffs[1], diffs[2])
	return nil
}
