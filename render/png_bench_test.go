package render

import (
	"bytes"
	"image"
	"image/png"
	"testing"
)

// BenchmarkEncodePNG compares zlib levels on a 1920×1080 panel and an
// overlay; it reports the encoded size so the speed/size trade-off of
// WritePNG's choice is visible.
func BenchmarkEncodePNG(b *testing.B) {
	panel, err := Panel(newSynth(224, 224).panel(4))
	if err != nil {
		b.Fatal(err)
	}
	over, err := Overlay(newSynth(224, 224).scene(false))
	if err != nil {
		b.Fatal(err)
	}
	for _, img := range []struct {
		name string
		im   image.Image
	}{{"panel", panel}, {"overlay", over}} {
		for _, lv := range []struct {
			name string
			l    png.CompressionLevel
		}{{"default", png.DefaultCompression}, {"bestspeed", png.BestSpeed}} {
			b.Run(img.name+"/"+lv.name, func(b *testing.B) {
				enc := png.Encoder{CompressionLevel: lv.l}
				var buf bytes.Buffer
				for b.Loop() {
					buf.Reset()
					if err := enc.Encode(&buf, img.im); err != nil {
						b.Fatal(err)
					}
				}
				b.ReportMetric(float64(buf.Len())/1e3, "kB")
			})
		}
	}
}
