package main

import (
	"context"
	"errors"

	"heedmap/batch"
)

// pipeline is the real per-image work of `heedmap run` and what happens
// once all images are done.
type pipeline struct {
	worker batch.Worker
	// finish runs after a complete run (every planned image has a record):
	// dataset summary, acceptance criteria, report. May be nil.
	finish func(ctx context.Context) error
}

// newPipeline connects the engine and the attribution, measurement and
// rendering packages for cfg.
//
// INTEGRATION SEAM. What the integrator connects here:
//  1. engine.Load(cfg.Model) → *engine.Graph, wrapped as explain.Network
//     (input/output names from g.Inputs()/g.Outputs(); Grad-CAM layer from
//     cfg.Layer or g.GradCAMLayer()).
//  2. explain/preprocess: preprocess.New(preprocess.Config{Width: cfg.Size,
//     Height: cfg.Size, Resize: preprocess.ResizeMode(cfg.Resize),
//     Mean/Std: cfg.Mean/cfg.Std as float32, Channels: upper(cfg.Channels)})
//     resolved against the model input shape.
//  3. the methods named in cfg.Methods with cfg.Patch, Stride, Fill,
//     Baseline, Steps, Samples, Seed; cfg.Target/cfg.Score choose the score
//     (Item.Label is the manifest label for --target label; --labels names
//     classes).
//  4. explain/measure on the lesion mask (Item.Mask) and each artefact mask
//     (Item.Artefacts) → Result.Metrics, column names "METHOD.MEASURE" and
//     "METHOD.MEASURE@artifact:NAME"; predicted class and target → Result.Info.
//  5. render: overlays written with dst.Path(NAME) (and maps as NPY when
//     cfg.SaveMaps) → Result.Files.
//  6. finish: render/report over OUT/records and OUT/metrics.csv, and
//     measure's criteria from cfg.Criteria.
//
// The Worker must be safe for concurrent use (one engine.Graph may be shared
// if Run is concurrency-safe; otherwise build one per worker goroutine).
func newPipeline(cfg Config) (*pipeline, error) {
	return nil, errors.New("this build has no attribution pipeline connected (cmd/heedmap/pipeline.go: newPipeline); use --dry-run to check inputs")
}
