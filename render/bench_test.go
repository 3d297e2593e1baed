package render

import "testing"

// BenchmarkOverlay224 renders one overlay of a 224×224 image (896×896
// picture); reports overlays per second.
func BenchmarkOverlay224(b *testing.B) {
	s := newSynth(224, 224).scene(false)
	b.ReportAllocs()
	for b.Loop() {
		if _, err := Overlay(s); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "img/s")
}

// BenchmarkPanel4 renders a 1920×1080 panel with four methods.
func BenchmarkPanel4(b *testing.B) {
	c := newSynth(224, 224).panel(4)
	for b.Loop() {
		if _, err := Panel(c); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "img/s")
}
