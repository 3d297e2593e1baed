package measure

import (
	"math"
	"math/rand/v2"
	"os"
	"sort"
	"testing"
)

// Wilson score intervals against the worked examples of Newcombe,
// "Two-sided confidence intervals for the single proportion: comparison of
// seven methods", Statistics in Medicine 1998;17:857–872 (value from
// memory), recomputed independently by testdata/wilson_reference.py
// (/usr/bin/python3, plain formula), which agrees to 4 decimals.
func TestWilsonNewcombeExamples(t *testing.T) {
	for _, c := range []struct {
		k, n   int
		lo, hi float64
	}{
		{81, 263, 0.255289, 0.366210},
		{15, 148, 0.062386, 0.160487},
		{0, 20, 0, 0.161125},
		{1, 29, 0.006113, 0.171755},
		{29, 29, 0.883030, 1},
	} {
		lo, hi, err := Wilson(c.k, c.n, Z95)
		if err != nil {
			t.Fatal(err)
		}
		if math.Abs(lo-c.lo) > 5e-7 || math.Abs(hi-c.hi) > 5e-7 {
			t.Errorf("Wilson(%d/%d) = %.6f–%.6f, want %.6f–%.6f", c.k, c.n, lo, hi, c.lo, c.hi)
		}
	}
	for _, bad := range [][2]int{{0, 0}, {3, 2}, {-1, 5}} {
		if _, _, err := Wilson(bad[0], bad[1], Z95); err == nil {
			t.Errorf("Wilson(%d, %d) accepted", bad[0], bad[1])
		}
	}
}

// Type-7 quantiles (Hyndman & Fan, American Statistician 1996; the default
// of R's quantile(): quantile(c(1,2,3,4), 0.25) = 1.75, common practice).
func TestQuantileType7(t *testing.T) {
	x := []float64{1, 2, 3, 4}
	for p, w := range map[float64]float64{0: 1, 0.25: 1.75, 0.5: 2.5, 0.9: 3.7, 1: 4} {
		if q := quantile(x, p); math.Abs(q-w) > 1e-12 {
			t.Errorf("quantile(%v) = %v, want %v", p, q, w)
		}
	}
	if Median([]float64{3, 1, 2}) != 2 || Median([]float64{4, 1, 3, 2}) != 2.5 {
		t.Error("median")
	}
}

// Closed-form bootstrap cases (Efron & Tibshirani 1993, percentile method):
// constant data give a degenerate interval; for x = {0, 1} the resampled
// mean is 0, ½ or 1 with probabilities ¼, ½, ¼, so the 2.5 % and 97.5 %
// percentiles are 0 and 1.
func TestBootstrapClosedForm(t *testing.T) {
	cfg := BootstrapConfig{Resamples: 2000, Level: 0.95, Seed1: 1, Seed2: 2}
	lo, hi, err := Bootstrap([]float64{0.3, 0.3, 0.3, 0.3, 0.3}, Mean, cfg)
	if err != nil || lo != 0.3 || hi != 0.3 {
		t.Errorf("constant data: %v–%v, %v", lo, hi, err)
	}
	lo, hi, _ = Bootstrap([]float64{0.7}, Median, cfg)
	if lo != 0.7 || hi != 0.7 {
		t.Errorf("one value: %v–%v", lo, hi)
	}
	lo, hi, _ = Bootstrap([]float64{0, 1}, Mean, cfg)
	if lo != 0 || hi != 1 {
		t.Errorf("{0,1}: %v–%v, want 0–1", lo, hi)
	}
	if _, _, err := Bootstrap(nil, Mean, cfg); err == nil {
		t.Error("empty sample accepted")
	}
}

func TestBootstrapDeterministic(t *testing.T) {
	rng := rand.New(rand.NewPCG(9, 9))
	x := make([]float64, 40)
	for i := range x {
		x[i] = rng.Float64()
	}
	cfg := BootstrapConfig{Resamples: 2000, Level: 0.95, Seed1: 7, Seed2: 11}
	a1, b1, _ := Bootstrap(x, Mean, cfg)
	a2, b2, _ := Bootstrap(x, Mean, cfg)
	if a1 != a2 || b1 != b2 {
		t.Errorf("same seed, different intervals: %v–%v vs %v–%v", a1, b1, a2, b2)
	}
	cfg.Seed2++
	a3, b3, _ := Bootstrap(x, Mean, cfg)
	if a1 == a3 && b1 == b3 {
		t.Error("different seed gave the identical interval")
	}
	if m := Mean(x); !(a1 < m && m < b1) {
		t.Errorf("interval %v–%v misses the sample mean %v", a1, b1, m)
	}
}

// Coverage: for n = 50 draws from N(0.6, 0.15²) the percentile-bootstrap
// 95 % interval of the mean should contain 0.6 about 95 % of the time
// (slightly less, ≈ 94 %, for the percentile method at this n: Efron &
// Tibshirani 1993, ch. 13). 1000 seeds; the binomial standard error of the
// coverage is ≈ 0.007, so [0.92, 0.97] fails only on a real defect.
func TestBootstrapCoverage(t *testing.T) {
	if os.Getenv("HEEDMAP_LONG") != "1" {
		t.Skip("set HEEDMAP_LONG=1 for the bootstrap coverage check")
	}
	const trials, n, mu, sd = 1000, 50, 0.6, 0.15
	cover := 0
	x := make([]float64, n)
	for s := uint64(0); s < trials; s++ {
		rng := rand.New(rand.NewPCG(s, 12345))
		for i := range x {
			x[i] = mu + sd*rng.NormFloat64()
		}
		lo, hi, err := Bootstrap(x, Mean, BootstrapConfig{Resamples: 2000, Level: 0.95, Seed1: s, Seed2: 999})
		if err != nil {
			t.Fatal(err)
		}
		if lo <= mu && mu <= hi {
			cover++
		}
	}
	c := float64(cover) / trials
	t.Logf("coverage of the mean of N(0.6, 0.15²), n=50: %.3f", c)
	if c < 0.92 || c > 0.97 {
		t.Errorf("coverage %.3f outside [0.92, 0.97]", c)
	}
}

// The percentile interval estimates quantiles of the ideal bootstrap
// distribution, the one with B → ∞ (Efron & Tibshirani 1993, ch. 6 and
// 13). For n = 5 that distribution is known exactly by enumerating all 5⁵
// = 3125 equally likely ordered resamples, so the Monte Carlo interval can
// be checked against it without any reference to our resampler: with
// B = 20 000 the Monte Carlo error of a 2.5 % quantile here is about 0.003,
// and the tolerance is 0.02. An off-by-one in the index draw or a wrong
// quantile level moves the ends by more than that.
func TestBootstrapMatchesIdealBootstrap(t *testing.T) {
	x := []float64{0.05, 0.2, 0.35, 0.8, 0.95}
	for _, st := range []struct {
		name string
		f    Statistic
	}{{"mean", Mean}, {"median", Median}} {
		var ideal []float64
		buf := make([]float64, 5)
		for code := 0; code < 3125; code++ {
			c := code
			for i := range buf {
				buf[i] = x[c%5]
				c /= 5
			}
			ideal = append(ideal, st.f(buf))
		}
		sort.Float64s(ideal)
		wantLo, wantHi := quantile(ideal, 0.025), quantile(ideal, 0.975)
		lo, hi, err := Bootstrap(x, st.f, BootstrapConfig{Resamples: 20000, Level: 0.95, Seed1: 3, Seed2: 4})
		if err != nil {
			t.Fatal(err)
		}
		if math.Abs(lo-wantLo) > 0.02 || math.Abs(hi-wantHi) > 0.02 {
			t.Errorf("%s: Monte Carlo %.4f–%.4f, ideal bootstrap %.4f–%.4f", st.name, lo, hi, wantLo, wantHi)
		}
	}
}
