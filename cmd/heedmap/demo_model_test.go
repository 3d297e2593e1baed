package main

import (
	"context"
	"os"
	"path/filepath"
	"testing"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/explain/preprocess"
	"heedmap/synth"
	"heedmap/tensor"
)

// The demo models through our runtime must reproduce the accuracies PyTorch
// measured when testdata/demo/train_demo.py trained them (recorded in
// testdata/demo/README.md). The test sets are regenerated bit-for-bit from
// the script's seeds (synth seed 2002, 400 scenes, 64×64, other artefacts at
// 0.25), so any difference beyond borderline float ties would be a runtime or
// preprocessing error.
func TestDemoModelsMatchPyTorchAccuracy(t *testing.T) {
	if testing.Short() {
		t.Skip("800 forward passes per model")
	}
	others := map[string][2]float64{synth.Ink: {0.25, 0.25}, synth.Hair: {0.25, 0.25}, synth.Bubbles: {0.25, 0.25}, synth.DarkCorners: {0.25, 0.25}}
	sets := map[string][2]float64{"aligned": {0, 1}, "flipped": {1, 0}}
	// Values from the run recorded in testdata/demo/README.md.
	want := map[string]map[string]float64{
		"shortcut": {"aligned": 0.993, "flipped": 0.185},
		"clean":    {"aligned": 0.877, "flipped": 0.880},
	}
	pp, err := preprocess.New(preprocess.Config{Width: 64, Height: 64, Mean: []float32{0.5, 0.5, 0.5}, Std: []float32{0.25, 0.25, 0.25}})
	if err != nil {
		t.Fatal(err)
	}
	inputs := map[string][]*tensor.Tensor{}
	labels := map[string][]int{}
	for name, ruler := range sets {
		rates := map[string][2]float64{synth.Ruler: ruler}
		for k, v := range others {
			rates[k] = v
		}
		for i := 0; i < 400; i++ {
			sc, err := synth.Generate(synth.SceneSeed(2002, i), synth.Options{Size: 64, Rates: rates})
			if err != nil {
				t.Fatal(err)
			}
			in, err := pp.Apply(context.Background(), sc.Image)
			if err != nil {
				t.Fatal(err)
			}
			inputs[name] = append(inputs[name], in.Tensor)
			labels[name] = append(labels[name], sc.Label)
		}
	}
	for model, accs := range want {
		path := filepath.Join("..", "..", "testdata", "demo", model+".onnx")
		if _, err := os.Stat(path); err != nil {
			t.Skipf("%s missing", path)
		}
		g, err := engine.Load(path)
		if err != nil {
			t.Fatal(err)
		}
		net, err := explain.FromGraph(g, explain.GraphOptions{})
		if err != nil {
			t.Fatal(err)
		}
		for set, w := range accs {
			xs := inputs[set]
			batch := tensor.New(len(xs), 3, 64, 64)
			for i, x := range xs {
				copy(batch.F32[i*3*64*64:], x.F32)
			}
			logits, err := net.Forward(context.Background(), batch)
			if err != nil {
				t.Fatal(err)
			}
			right := 0
			for i := range xs {
				row := logits.F32[2*i : 2*i+2]
				pred := 0
				if row[1] > row[0] {
					pred = 1
				}
				if pred == labels[set][i] {
					right++
				}
			}
			got := float64(right) / float64(len(xs))
			t.Logf("%s on %s: accuracy %.4f (PyTorch %.3f)", model, set, got, w)
			if got < w-0.006 || got > w+0.006 {
				t.Errorf("%s on %s: accuracy %.4f through our runtime, PyTorch measured %.3f", model, set, got, w)
			}
		}
	}
}
