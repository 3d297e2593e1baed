// Package explaintest holds small networks whose attributions are known in closed
// form, for the tests of the attribution methods.
package explaintest

import (
	"context"
	"fmt"
	"math/rand/v2"

	"heedmap/explain"
	"heedmap/tensor"
)

// Linear is logits = W·flatten(x) + b, with weights chosen by the test.
// Its gradient with respect to x for seed s is Σ_k s_k W_k, exactly; the
// "input" layer is x itself.
type Linear struct {
	C, H, Wd int
	K        int
	W        []float32 // [K, C·H·Wd]
	B        []float32
	Batch    int // fixed batch size, or -1
	Calls    int // forward batches run
}

func NewLinear(c, h, w, k int, seed uint64) *Linear {
	rng := rand.New(rand.NewPCG(seed, 1))
	n := &Linear{C: c, H: h, Wd: w, K: k, W: make([]float32, k*c*h*w), B: make([]float32, k), Batch: -1}
	for i := range n.W {
		n.W[i] = float32(rng.NormFloat64())
	}
	for i := range n.B {
		n.B[i] = float32(rng.NormFloat64())
	}
	return n
}

func (n *Linear) InputShape() []int { return []int{n.Batch, n.C, n.H, n.Wd} }

func (n *Linear) check(x *tensor.Tensor) (int, error) {
	if len(x.Shape) != 4 || x.Shape[1] != n.C || x.Shape[2] != n.H || x.Shape[3] != n.Wd {
		return 0, fmt.Errorf("Linear: input %v", x)
	}
	if n.Batch > 0 && x.Shape[0] != n.Batch {
		return 0, fmt.Errorf("Linear: batch %d, fixed %d", x.Shape[0], n.Batch)
	}
	return x.Shape[0], nil
}

func (n *Linear) Forward(_ context.Context, x *tensor.Tensor) (*tensor.Tensor, error) {
	b, err := n.check(x)
	if err != nil {
		return nil, err
	}
	n.Calls++
	d := n.C * n.H * n.Wd
	out := tensor.New(b, n.K)
	for i := 0; i < b; i++ {
		for k := 0; k < n.K; k++ {
			s := float64(n.B[k])
			for j := 0; j < d; j++ {
				s += float64(n.W[k*d+j]) * float64(x.F32[i*d+j])
			}
			out.F32[i*n.K+k] = float32(s)
		}
	}
	return out, nil
}

func (n *Linear) Gradient(ctx context.Context, x *tensor.Tensor, seed func(*tensor.Tensor) (*tensor.Tensor, error), layer string) (*explain.Gradients, error) {
	logits, err := n.Forward(ctx, x)
	if err != nil {
		return nil, err
	}
	s, err := seed(logits)
	if err != nil {
		return nil, err
	}
	b, d := x.Shape[0], n.C*n.H*n.Wd
	g := tensor.New(x.Shape...)
	for i := 0; i < b; i++ {
		for j := 0; j < d; j++ {
			var v float64
			for k := 0; k < n.K; k++ {
				v += float64(s.F32[i*n.K+k]) * float64(n.W[k*d+j])
			}
			g.F32[i*d+j] = float32(v)
		}
	}
	out := &explain.Gradients{Logits: logits, Input: g}
	switch layer {
	case "":
	case "input":
		out.Layer, out.LayerGrad = x.Clone(), g.Clone()
	default:
		return nil, fmt.Errorf("Linear: no layer %q", layer)
	}
	return out, nil
}

// MLP is logits = W2·ReLU(W1·flatten(x) + b1) + b2. Its input gradient
// for seed s is W1ᵀ (1[z > 0] ⊙ W2ᵀ s), with z the hidden pre-activation.
type MLP struct {
	c, h, w, hid, k int
	W1, b1, W2, b2  []float32
}

// NewMLP returns an MLP with normal random weights of sd ½ (seeded).
func NewMLP(c, h, w, hid, k int, seed uint64) *MLP {
	rng := rand.New(rand.NewPCG(seed, 2))
	d := c * h * w
	m := &MLP{c: c, h: h, w: w, hid: hid, k: k,
		W1: make([]float32, hid*d), b1: make([]float32, hid), W2: make([]float32, k*hid), b2: make([]float32, k)}
	for _, s := range [][]float32{m.W1, m.b1, m.W2, m.b2} {
		for i := range s {
			s[i] = float32(rng.NormFloat64() / 2)
		}
	}
	return m
}

func (m *MLP) InputShape() []int { return []int{-1, m.c, m.h, m.w} }

func (m *MLP) hidden(x []float32) []float64 {
	d := m.c * m.h * m.w
	z := make([]float64, m.hid)
	for u := range z {
		s := float64(m.b1[u])
		for j := 0; j < d; j++ {
			s += float64(m.W1[u*d+j]) * float64(x[j])
		}
		z[u] = s
	}
	return z
}

func (m *MLP) Forward(_ context.Context, x *tensor.Tensor) (*tensor.Tensor, error) {
	b, d := x.Shape[0], m.c*m.h*m.w
	out := tensor.New(b, m.k)
	for i := 0; i < b; i++ {
		z := m.hidden(x.F32[i*d : (i+1)*d])
		for k := 0; k < m.k; k++ {
			s := float64(m.b2[k])
			for u, v := range z {
				if v > 0 {
					s += float64(m.W2[k*m.hid+u]) * v
				}
			}
			out.F32[i*m.k+k] = float32(s)
		}
	}
	return out, nil
}

func (m *MLP) Gradient(ctx context.Context, x *tensor.Tensor, seed func(*tensor.Tensor) (*tensor.Tensor, error), layer string) (*explain.Gradients, error) {
	logits, err := m.Forward(ctx, x)
	if err != nil {
		return nil, err
	}
	s, err := seed(logits)
	if err != nil {
		return nil, err
	}
	b, d := x.Shape[0], m.c*m.h*m.w
	g := tensor.New(x.Shape...)
	for i := 0; i < b; i++ {
		z := m.hidden(x.F32[i*d : (i+1)*d])
		dz := make([]float64, m.hid)
		for u := range dz {
			if z[u] > 0 {
				for k := 0; k < m.k; k++ {
					dz[u] += float64(s.F32[i*m.k+k]) * float64(m.W2[k*m.hid+u])
				}
			}
		}
		for j := 0; j < d; j++ {
			var v float64
			for u := range dz {
				v += dz[u] * float64(m.W1[u*d+j])
			}
			g.F32[i*d+j] = float32(v)
		}
	}
	if layer != "" {
		return nil, fmt.Errorf("MLP: no layers")
	}
	return &explain.Gradients{Logits: logits, Input: g}, nil
}

// RandomInput is a [1,c,h,w] input uniform in [−1, 1] (seeded).
func RandomInput(c, h, w int, seed uint64) *tensor.Tensor {
	rng := rand.New(rand.NewPCG(seed, 3))
	x := tensor.New(1, c, h, w)
	for i := range x.F32 {
		x.F32[i] = float32(rng.Float64()*2 - 1)
	}
	return x
}
