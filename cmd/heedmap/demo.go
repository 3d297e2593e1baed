package main

import (
	"context"
	_ "embed"
	"fmt"
	"io"
	"os"
	"path/filepath"

	"heedmap/synth"
)

// demoModel is testdata/demo/shortcut.onnx (copied here by
// testdata/demo/train_demo.py because go:embed cannot reach testdata/): a
// 47k-parameter CNN trained on synthetic scenes where a ruler co-occurs with
// the malignant-like class, so it has learnt to look at the ruler.
//
//go:embed demo_shortcut.onnx
var demoModel []byte

const demoLabels = "benign-like\nmalignant-like\n"

func cmdDemo(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := newFlagSet("demo", stderr)
	out := fs.String("out", "heedmap-demo", "output folder")
	n := fs.Int("n", 24, "number of synthetic images")
	workers := fs.Int("workers", 0, "images processed at once; 0 = one per CPU core")
	testWorker := fs.String("x-test-worker", "", "")
	help := func(w io.Writer) {
		fmt.Fprint(w, `Usage: heedmap demo [--out DIR] [--n N] [--workers N]

Generates synthetic, invented dermoscopy-like images (a lesion plus rulers,
ink, hair, dark corners and gel bubbles, each with its own mask; no real
patient data) into DIR/data, and runs 'heedmap run' on them with the bundled
demo classifier, which was trained where a ruler co-occurred with the
malignant-like class. The results show how much attribution falls on the
ruler rather than on the lesion. Rerunning resumes.

Example:
  heedmap demo --out /tmp/heedmap-demo

Flags:
  --out DIR      output folder (default heedmap-demo)
  --n N          number of images (default 24)
  --workers N    images processed at once; 0 = one per CPU core

`+exitCodesHelp)
	}
	if code, done := parse(fs, args, help, stdout, stderr); done {
		return code
	}
	if *n < 1 || *n > 100000 {
		fmt.Fprintln(stderr, "heedmap demo: --n must be between 1 and 100000")
		return exitUsage
	}
	data := filepath.Join(*out, "data")
	rates := map[string][2]float64{synth.Ruler: {0.5, 0.5}, synth.Ink: {0.25, 0.25}, synth.Hair: {0.25, 0.25}, synth.Bubbles: {0.25, 0.25}, synth.DarkCorners: {0.25, 0.25}}
	if err := synth.WriteDataset(data, *n, synth.Options{Size: 64, Seed: 2026, Rates: rates}); err != nil {
		fmt.Fprintf(stderr, "heedmap demo: %v\n", err)
		return exitUsage
	}
	model := filepath.Join(data, "shortcut.onnx")
	labels := filepath.Join(data, "labels.txt")
	for p, b := range map[string][]byte{model: demoModel, labels: []byte(demoLabels)} {
		if err := os.WriteFile(p, b, 0o644); err != nil {
			fmt.Fprintf(stderr, "heedmap demo: %v\n", err)
			return exitUsage
		}
	}
	fmt.Fprintf(stderr, "demo: %d synthetic images in %s\n", *n, data)
	cfg := defaultConfig()
	cfg.Model, cfg.Images, cfg.Out, cfg.Labels = model, filepath.Join(data, "manifest.csv"), *out, labels
	// The demo models' preprocessing (testdata/demo/README.md).
	cfg.Size, cfg.Mean, cfg.Std = 64, []float64{0.5, 0.5, 0.5}, []float64{0.25, 0.25, 0.25}
	cfg.Patch, cfg.Stride = 8, 4
	cfg.Workers = *workers
	return execute(ctx, cfg, runFlags{testWorker: *testWorker}, stdout, stderr)
}
