package measure

import (
	"math"
	"testing"

	"heedmap/explain"
)

// BenchmarkMeasure224 times one method's measures on a 224×224 map with a
// round lesion and two artefact masks (the plan is built once per image and
// excluded); it reports maps per second.
func BenchmarkMeasure224(b *testing.B) {
	const n = 224
	lesion := make([]bool, n*n)
	ruler := make([]bool, n*n)
	ink := make([]bool, n*n)
	m := explain.Map{W: n, H: n, Data: make([]float32, n*n)}
	for p := range lesion {
		x, y := float64(p%n), float64(p/n)
		lesion[p] = math.Hypot(x-112, y-112) < 50
		ruler[p] = y > 200
		ink[p] = x < 15
		m.Data[p] = float32(math.Sin(x/7)*math.Cos(y/9) + 0.2)
	}
	pl, err := NewPlan(Masks{W: n, H: n, Lesion: lesion, Artefacts: map[string][]bool{"ruler": ruler, "ink": ink}}, DefaultParams())
	if err != nil {
		b.Fatal(err)
	}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := pl.Measure(MethodIntegratedGradients, m); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "maps/s")
}

// BenchmarkPlan224 times building a plan (distance transform and regions).
func BenchmarkPlan224(b *testing.B) {
	const n = 224
	lesion := make([]bool, n*n)
	for p := range lesion {
		lesion[p] = math.Hypot(float64(p%n)-112, float64(p/n)-112) < 50
	}
	for i := 0; i < b.N; i++ {
		if _, err := NewPlan(Masks{W: n, H: n, Lesion: lesion}, DefaultParams()); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "plans/s")
}
