package main

import (
	"context"
	"fmt"
	"image"
	_ "image/jpeg"
	_ "image/png"
	"os"
	"strings"
	"time"

	"heedmap/batch"
)

// testWorker is the per-image work behind the hidden flag
// `heedmap run --x-test-worker DELAY` (e.g. 20ms). It exists so the batch
// machinery can be tested end to end in the real binary, including kill -9
// and resume, without a model: it sleeps DELAY (interruptibly), then
// reports each image's channel means and the mask's area fraction and
// writes one small file. Ids containing "fail" fail on purpose. It is not
// listed in --help and is not part of the supported interface.
type testWorker struct{ delay time.Duration }

func (w testWorker) Process(ctx context.Context, it batch.Item, dst batch.Dest) (batch.Result, error) {
	select {
	case <-time.After(w.delay):
	case <-ctx.Done():
		return batch.Result{}, ctx.Err()
	}
	if strings.Contains(it.ID, "fail") {
		return batch.Result{}, fmt.Errorf("%s: deliberate test failure", it.Image)
	}
	img, err := decodeFile(it.Image)
	if err != nil {
		return batch.Result{}, err
	}
	b := img.Bounds()
	var s [3]float64
	for y := b.Min.Y; y < b.Max.Y; y++ {
		for x := b.Min.X; x < b.Max.X; x++ {
			r, g, bl, _ := img.At(x, y).RGBA()
			s[0] += float64(r) / 0xffff
			s[1] += float64(g) / 0xffff
			s[2] += float64(bl) / 0xffff
		}
	}
	n := float64(b.Dx() * b.Dy())
	res := batch.Result{
		Metrics: map[string]float64{"test_mean_r": s[0] / n, "test_mean_g": s[1] / n, "test_mean_b": s[2] / n},
		Info:    map[string]string{"test_size": fmt.Sprintf("%dx%d", b.Dx(), b.Dy())},
	}
	if it.Mask != "" {
		m, err := decodeFile(it.Mask)
		if err != nil {
			return batch.Result{}, err
		}
		in := 0
		for y := b.Min.Y; y < b.Max.Y; y++ {
			for x := b.Min.X; x < b.Max.X; x++ {
				if r, _, _, _ := m.At(x, y).RGBA(); r >= 0x8000 {
					in++
				}
			}
		}
		res.Metrics["test_mask_fraction"] = float64(in) / n
	}
	abs, rel, err := dst.Path("checks", ".txt")
	if err != nil {
		return batch.Result{}, err
	}
	if err := batch.WriteFileAtomic(abs, []byte(fmt.Sprintln(res.Metrics))); err != nil {
		return batch.Result{}, err
	}
	res.Files = []string{rel}
	return res, nil
}

func decodeFile(path string) (image.Image, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	img, _, err := image.Decode(f)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return img, nil
}
