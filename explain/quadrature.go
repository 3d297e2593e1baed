package explain

import (
	"fmt"
	"math"
)

// Quadrature is the rule that approximates integrated gradients' path
// integral ∫₀¹ g(α) dα by Σ_k w_k g(α_k).
type Quadrature int

const (
	// Midpoint is the Riemann midpoint rule: α_k = (k + ½)/m, w_k = 1/m.
	// Error O(1/m²) for smooth integrands; robust for the kinked,
	// piecewise-linear paths of ReLU networks.
	Midpoint Quadrature = iota
	// GaussLegendre uses the m-point Gauss–Legendre rule mapped to [0,1]:
	// exact for polynomials of degree 2m−1, so far fewer steps for smooth
	// (e.g. softmax-output, GELU/SiLU) networks, but no better than the
	// midpoint rule across ReLU kinks.
	GaussLegendre
)

func (q Quadrature) String() string {
	if q == GaussLegendre {
		return "gauss-legendre"
	}
	return "midpoint"
}

// ParseQuadrature reads "midpoint" or "gauss-legendre".
func ParseQuadrature(s string) (Quadrature, error) {
	switch s {
	case "", "midpoint", "riemann":
		return Midpoint, nil
	case "gauss-legendre", "gauss", "gl":
		return GaussLegendre, nil
	}
	return 0, fmt.Errorf("explain: quadrature %q: want midpoint or gauss-legendre", s)
}

// Nodes returns m nodes in [0,1] and weights summing to 1.
func (q Quadrature) Nodes(m int) (alpha, weight []float64, err error) {
	if m < 1 {
		return nil, nil, fmt.Errorf("explain: %d integration steps, want ≥ 1", m)
	}
	alpha, weight = make([]float64, m), make([]float64, m)
	if q != GaussLegendre {
		for k := range alpha {
			alpha[k], weight[k] = (float64(k)+0.5)/float64(m), 1/float64(m)
		}
		return alpha, weight, nil
	}
	x, w := LegendreNodes(m)
	for k := range x {
		alpha[k], weight[k] = (x[k]+1)/2, w[k]/2
	}
	return alpha, weight, nil
}

// LegendreNodes returns the m-point Gauss–Legendre nodes on [−1, 1] in
// increasing order and their weights: the roots x_k of the Legendre
// polynomial P_m, found by Newton's method from the Chebyshev-like start
// cos(π(k − ¼)/(m + ½)), and w_k = 2 / ((1 − x_k²) P_m′(x_k)²)
// (Abramowitz & Stegun 25.4.29).
func LegendreNodes(m int) (x, w []float64) {
	x, w = make([]float64, m), make([]float64, m)
	for k := 1; k <= (m+1)/2; k++ {
		z := math.Cos(math.Pi * (float64(k) - 0.25) / (float64(m) + 0.5))
		var dp float64
		for iter := 0; iter < 100; iter++ {
			// Three-term recurrence (A&S 22.7.10): j P_j = (2j−1) z P_{j−1} − (j−1) P_{j−2}.
			p0, p1 := 1.0, z
			for j := 2; j <= m; j++ {
				p0, p1 = p1, ((2*float64(j)-1)*z*p1-(float64(j)-1)*p0)/float64(j)
			}
			if m == 1 {
				p0, p1 = 1, z
			}
			// P_m′(z) = m (z P_m − P_{m−1}) / (z² − 1) (A&S 22.8.5).
			dp = float64(m) * (z*p1 - p0) / (z*z - 1)
			dz := p1 / dp
			z -= dz
			if math.Abs(dz) < 1e-16 {
				break
			}
		}
		// Recompute P_m′ at the converged root for the weight.
		p0, p1 := 1.0, z
		for j := 2; j <= m; j++ {
			p0, p1 = p1, ((2*float64(j)-1)*z*p1-(float64(j)-1)*p0)/float64(j)
		}
		if m == 1 {
			p0, p1 = 1, z
		}
		dp = float64(m) * (z*p1 - p0) / (z*z - 1)
		wk := 2 / ((1 - z*z) * dp * dp)
		x[k-1], x[m-k] = -z, z
		w[k-1], w[m-k] = wk, wk
	}
	return x, w
}
