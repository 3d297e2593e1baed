package preprocess

import (
	"context"
	"image"
	"testing"
)

// BenchmarkApply: a 2000×1500 4:2:0 YCbCr picture (what a camera JPEG
// decodes to) cropped to 224×224 with ImageNet normalisation.
//
//	go test -run '^$' -bench Apply ./explain/preprocess
func BenchmarkApply(b *testing.B) {
	img := image.NewYCbCr(image.Rect(0, 0, 2000, 1500), image.YCbCrSubsampleRatio420)
	for i := range img.Y {
		img.Y[i] = uint8(i * 7)
	}
	for i := range img.Cb {
		img.Cb[i], img.Cr[i] = uint8(i*3), uint8(i*5)
	}
	p, err := New(Config{Width: 224, Height: 224, Resize: Crop, Mean: []float32{0.485, 0.456, 0.406}, Std: []float32{0.229, 0.224, 0.225}})
	if err != nil {
		b.Fatal(err)
	}
	for i := 0; i < b.N; i++ {
		if _, err := p.Apply(context.Background(), img); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Minutes(), "img/min")
}
