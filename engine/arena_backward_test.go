package engine

import (
	"context"
	"math"
	"testing"

	"heedmap/tensor"
)

// TestArenaBackwardReuse runs warm forward+backward passes of the compact
// ResNet-18 and checks that the backward sweep draws its intermediate
// gradients from the arena (a warm pass allocates fresh buffers only for
// what the caller receives: the graph outputs and the returned gradients),
// that the input gradient equals, bit for bit, the one computed with
// nothing recycled, and that it matches PyTorch's (testdata/nets/resnet18/
// grad_input.pb, made by testdata/reference/export_nets.py).
func TestArenaBackwardReuse(t *testing.T) {
	n := loadCompactNet(t, "resnet18")
	meta, x, g := n.meta, n.x, n.g
	ctx := context.Background()
	in := map[string]*tensor.Tensor{meta.Input: x}
	step := func(g *Graph) *tensor.Tensor {
		p, err := g.Run(ctx, in, RunOptions{Backward: true})
		if err != nil {
			t.Fatal(err)
		}
		y, _ := p.Value(meta.Output)
		seed := tensor.New(y.Shape...)
		classes := y.Shape[len(y.Shape)-1]
		for i := meta.Class; i < len(seed.F32); i += classes {
			seed.F32[i] = 1
		}
		grads, err := p.Backward(ctx, map[string]*tensor.Tensor{meta.Output: seed}, []string{meta.Input})
		if err != nil {
			t.Fatal(err)
		}
		p.Release()
		if _, err := p.Backward(ctx, map[string]*tensor.Tensor{meta.Output: seed}, []string{meta.Input}); err == nil {
			t.Fatal("Backward after Release succeeded")
		}
		return grads[meta.Input]
	}

	// Reference: a graph whose arena never gets a buffer back, so every
	// forward value and gradient is a fresh zeroed allocation.
	plain := loadCompactNet(t, "resnet18").g
	plain.arena = nil
	ref := step(plain)

	want := n.tensor(t, "grad_input.pb")
	var dot, na, nb, nd float64
	for i, a := range ref.F32 {
		w := float64(want.F32[i])
		dot += float64(a) * w
		na += float64(a) * float64(a)
		nb += w * w
		nd += (float64(a) - w) * (float64(a) - w)
	}
	cos, rel := dot/math.Sqrt(na*nb), math.Sqrt(nd/nb)
	// The thresholds networks_test.go uses (common practice).
	if cos < 0.9999 || rel > 1e-3 || math.IsNaN(cos) || math.IsNaN(rel) {
		t.Fatalf("unpooled input gradient: cosine %.6f, relative L2 %.2e vs PyTorch", cos, rel)
	}
	for pass := 0; pass < 4; pass++ {
		m0, h0 := g.arena.misses, g.arena.reused()
		got := step(g) // Run, Backward, Release
		for i := range ref.F32 {
			if got.F32[i] != ref.F32[i] {
				t.Fatalf("pass %d: input gradient %d is %v, unpooled %v", pass, i, got.F32[i], ref.F32[i])
			}
		}
		// Warm, with the pass released: every forward value, kept value
		// and intermediate gradient comes from the arena. Only what the
		// caller keeps is allocated afresh: the input gradient, and a
		// buffer the logits hold through Flatten's view of it.
		fresh, reused := g.arena.misses-m0, g.arena.reused()-h0
		if pass > 1 && fresh > 2 {
			t.Errorf("pass %d: forward+backward allocated %d buffers afresh (reused %d), want at most 2", pass, fresh, reused)
		}
	}
	// With the input gradient handed back (Graph.Recycle), the next
	// pass's input gradient is a recycled buffer too, and still exact.
	for pass := 0; pass < 3; pass++ {
		m0 := g.arena.misses
		got := step(g)
		for i := range ref.F32 {
			if got.F32[i] != ref.F32[i] {
				t.Fatalf("recycling pass %d: input gradient %d is %v, unpooled %v", pass, i, got.F32[i], ref.F32[i])
			}
		}
		g.Recycle(got)
		if fresh := g.arena.misses - m0; pass > 0 && fresh > 1 {
			t.Errorf("recycling pass %d: forward+backward allocated %d buffers afresh, want at most 1 (the logits' view)", pass, fresh)
		}
	}
}

// TestArenaBackwardConcurrent runs forward+backward passes of the compact
// ResNet-18 from several goroutines sharing one Graph (and so one arena), as
// the batch workers do; every input gradient must equal the sequential one
// bit for bit. Run with -race to check the arena under backward traffic.
func TestArenaBackwardConcurrent(t *testing.T) {
	n := loadCompactNet(t, "resnet18")
	meta, x, g := n.meta, n.x, n.g
	ctx := context.Background()
	in := map[string]*tensor.Tensor{meta.Input: x}
	grad := func() (*tensor.Tensor, error) {
		p, err := g.Run(ctx, in, RunOptions{Backward: true})
		if err != nil {
			return nil, err
		}
		y, _ := p.Value(meta.Output)
		seed := tensor.New(y.Shape...)
		classes := y.Shape[len(y.Shape)-1]
		for i := 0; i < len(seed.F32); i += classes {
			seed.F32[i] = 1
		}
		gs, err := p.Backward(ctx, map[string]*tensor.Tensor{meta.Output: seed}, []string{meta.Input})
		if err != nil {
			return nil, err
		}
		p.Release()
		return gs[meta.Input], nil
	}
	want, err := grad()
	if err != nil {
		t.Fatal(err)
	}
	const workers, rounds = 3, 4
	errs := make(chan string, workers)
	for w := 0; w < workers; w++ {
		go func() {
			for r := 0; r < rounds; r++ {
				got, err := grad()
				if err != nil {
					errs <- err.Error()
					return
				}
				for i := range want.F32 {
					if got.F32[i] != want.F32[i] {
						errs <- "concurrent backward differs from the sequential one"
						return
					}
				}
			}
			errs <- ""
		}()
	}
	for w := 0; w < workers; w++ {
		if e := <-errs; e != "" {
			t.Fatal(e)
		}
	}
}
