package engine

// PeakBytes is the most activation data, in bytes, the pass held at once
// while it ran forward: node outputs only (inputs and initializers are not
// counted), each view counted again, so it is an upper bound. A pass run
// for Backward keeps what Backward reads, so its peak is higher than a
// forward-only pass's. Memory scales with the batch, so PeakBytes divided by
// the batch is the per-image cost callers size their batches by. A batch
// Run took image by image (split.go) reports the sum of its images' peaks.
func (p *Pass) PeakBytes() int64 { return p.peakBytes }
