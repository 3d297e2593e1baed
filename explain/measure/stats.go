package measure

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"sort"
)

// Z95 is the standard normal 97.5 % quantile, for two-sided 95 % intervals.
const Z95 = 1.959963984540054

// Interval is a confidence interval; both ends are undefined together.
type Interval struct {
	Lo Value `json:"lo"`
	Hi Value `json:"hi"`
}

func undefInterval(reason string) Interval { return Interval{Undef(reason), Undef(reason)} }

// Wilson returns the Wilson score interval for k successes in n trials
// (Wilson, "Probable inference, the law of succession, and statistical
// inference", JASA 22:209–212, 1927):
//
//	(p̂ + z²/2n ± z·sqrt(p̂(1−p̂)/n + z²/4n²)) / (1 + z²/n).
//
// Unlike the Wald interval it stays inside [0, 1] and does not collapse to
// a point at k = 0 or k = n, which matters for the small per-class groups a
// validation set breaks into (Newcombe, Statistics in Medicine 17:857–872,
// 1998, method 3).
func Wilson(k, n int, z float64) (lo, hi float64, err error) {
	if n <= 0 || k < 0 || k > n {
		return 0, 0, fmt.Errorf("measure: Wilson interval needs 0 ≤ k ≤ n, n > 0; got k=%d n=%d", k, n)
	}
	if !(z > 0) || math.IsInf(z, 0) {
		return 0, 0, fmt.Errorf("measure: Wilson interval needs a finite z > 0, got %v", z)
	}
	nf := float64(n)
	p := float64(k) / nf
	z2 := z * z
	den := 1 + z2/nf
	centre := (p + z2/(2*nf)) / den
	half := z * math.Sqrt(p*(1-p)/nf+z2/(4*nf*nf)) / den
	lo, hi = centre-half, centre+half
	// The formula gives exactly 0 and 1 at the extremes only up to
	// rounding; clamp so that 0/n never reports a negative lower end.
	if k == 0 {
		lo = 0
	}
	if k == n {
		hi = 1
	}
	return max(lo, 0), min(hi, 1), nil
}

// Statistic maps a sample to a number (mean, median, ...). It may reorder
// its argument.
type Statistic func([]float64) float64

// Mean is the arithmetic mean.
func Mean(x []float64) float64 {
	s := 0.0
	for _, v := range x {
		s += v
	}
	return s / float64(len(x))
}

// Median is the middle value, or the mean of the two middle values. It sorts x.
func Median(x []float64) float64 {
	sort.Float64s(x)
	n := len(x)
	if n%2 == 1 {
		return x[n/2]
	}
	return (x[n/2-1] + x[n/2]) / 2
}

// quantile of sorted data with linear interpolation between order
// statistics, h = (n−1)p (Hyndman & Fan 1996, definition 7).
func quantile(sorted []float64, p float64) float64 {
	h := float64(len(sorted)-1) * p
	lo := math.Floor(h)
	i := int(lo)
	if i+1 >= len(sorted) {
		return sorted[len(sorted)-1]
	}
	return sorted[i] + (h-lo)*(sorted[i+1]-sorted[i])
}

// BootstrapConfig fixes the resampling: number of resamples, interval level
// and the two PCG seed words (math/rand/v2 PCG). The same config and data
// always give the same interval.
type BootstrapConfig struct {
	Resamples    int     // default 2000
	Level        float64 // e.g. 0.95
	Seed1, Seed2 uint64
}

// Bootstrap returns the percentile-bootstrap interval of stat over x (Efron
// & Tibshirani, "An Introduction to the Bootstrap", 1993, ch. 13): draw
// Resamples samples of len(x) with replacement, compute stat on each, and
// take the (1−Level)/2 and (1+Level)/2 quantiles of those values. The
// percentile method needs no variance formula, so the median is handled the
// same way as the mean; its coverage is only approximate for small or
// skewed samples, which the report states.
func Bootstrap(x []float64, stat Statistic, cfg BootstrapConfig) (lo, hi float64, err error) {
	if len(x) == 0 {
		return 0, 0, errors.New("measure: bootstrap of an empty sample")
	}
	if cfg.Resamples < 1 {
		return 0, 0, fmt.Errorf("measure: bootstrap needs ≥ 1 resample, got %d", cfg.Resamples)
	}
	if !(cfg.Level > 0 && cfg.Level < 1) {
		return 0, 0, fmt.Errorf("measure: bootstrap level %v must be in (0, 1)", cfg.Level)
	}
	rng := rand.New(rand.NewPCG(cfg.Seed1, cfg.Seed2))
	buf := make([]float64, len(x))
	stats := make([]float64, cfg.Resamples)
	for b := range stats {
		for i := range buf {
			buf[i] = x[rng.IntN(len(x))]
		}
		stats[b] = stat(buf)
	}
	sort.Float64s(stats)
	a := (1 - cfg.Level) / 2
	return quantile(stats, a), quantile(stats, 1-a), nil
}
