package engine

import (
	"context"
	"math"
	"testing"

	"heedmap/tensor"
)

// TestArenaReuseKeepsResults runs the committed compact networks several
// times through one Graph, interleaving a different input, so later passes
// run on buffers recycled from earlier ones. Every pass on the reference
// input must reproduce PyTorch's logits (testdata/nets/*/logits.pb, made by
// testdata/reference/export_nets.py) and the first pass bit for bit, and
// the arena must actually have been used.
func TestArenaReuseKeepsResults(t *testing.T) {
	for _, name := range []string{"resnet18", "mobilenet_v2"} {
		t.Run(name, func(t *testing.T) {
			n := loadCompactNet(t, name)
			meta, x, g := n.meta, n.x, n.g
			want := n.tensor(t, "logits.pb")
			other := x.Clone()
			for i := range other.F32 {
				other.F32[i] = -0.5 * other.F32[i]
			}
			ctx := context.Background()
			var first []float32
			for pass := 0; pass < 3; pass++ {
				for _, in := range []*tensor.Tensor{x, other} {
					p, err := g.Run(ctx, map[string]*tensor.Tensor{meta.Input: in}, RunOptions{})
					if err != nil {
						t.Fatal(err)
					}
					if in != x {
						continue
					}
					y, _ := p.Value(meta.Output)
					var num, den float64
					for i := range want.F32 {
						num = math.Max(num, math.Abs(float64(y.F32[i])-float64(want.F32[i])))
						den = math.Max(den, math.Abs(float64(want.F32[i])))
					}
					// 1e-4: the float32 tolerance networks_test.go uses (common practice).
					if num/den > 1e-4 {
						t.Fatalf("pass %d: logits differ from PyTorch by %.2e (relative)", pass, num/den)
					}
					if first == nil {
						first = append([]float32(nil), y.F32...)
						continue
					}
					for i := range first {
						if y.F32[i] != first[i] {
							t.Fatalf("pass %d: logit %d is %v, first pass %v", pass, i, y.F32[i], first[i])
						}
					}
				}
			}
			if g.arena.reused() == 0 {
				t.Fatal("no buffer was reused")
			}
		})
	}
}

// TestArenaConcurrentRuns runs forward-only passes (fused, arena-backed,
// slab-parallel convolutions) of the compact ResNet-18 from several
// goroutines at once; each must equal the sequential pass bit for bit.
// Run with -race to check the arena and the slab workers.
func TestArenaConcurrentRuns(t *testing.T) {
	n := loadCompactNet(t, "resnet18")
	meta, x, g := n.meta, n.x, n.g
	ctx := context.Background()
	in := map[string]*tensor.Tensor{meta.Input: x}
	p, err := g.Run(ctx, in, RunOptions{})
	if err != nil {
		t.Fatal(err)
	}
	want, _ := p.Value(meta.Output)
	errs := make(chan string, 4)
	for i := 0; i < 4; i++ {
		go func() {
			msg := ""
			for rep := 0; rep < 3 && msg == ""; rep++ {
				p, err := g.Run(ctx, in, RunOptions{})
				if err != nil {
					msg = err.Error()
					break
				}
				y, _ := p.Value(meta.Output)
				for j := range want.F32 {
					if y.F32[j] != want.F32[j] {
						msg = "concurrent pass differs from the sequential one"
						break
					}
				}
			}
			errs <- msg
		}()
	}
	for i := 0; i < 4; i++ {
		if msg := <-errs; msg != "" {
			t.Fatal(msg)
		}
	}
}

// TestArenaBoundedByPassPeak runs the compact ResNet-18 many times at
// several batch sizes (as RISE and integrated gradients do: full batches, a
// short last batch, single images) and checks, with the engine's own byte
// accounting, that the arena never holds more than arenaPeakFactor times
// one pass's peak live activation bytes (passes here run one at a time)
// and that, once warm, passes allocate nothing but their graph outputs
// (counted over a round: an output handed to the caller may take a buffer
// another batch size's pass would have reused, so a single pass can miss
// one more).
// Before the bound, pooling outputs returned at every pass but never asked
// for again piled up to a fixed 384 MiB whatever the network's size.
func TestArenaBoundedByPassPeak(t *testing.T) {
	n := loadCompactNet(t, "resnet18")
	meta, x, g := n.meta, n.x, n.g
	inputs := []*tensor.Tensor{x}
	if g.Inputs()[0].Shape[0].Param != "" { // a symbolic batch: vary it
		one := tensor.FromFloat32(x.F32[:len(x.F32)/x.Shape[0]], append([]int{1}, x.Shape[1:]...)...)
		four := tensor.New(append([]int{4}, x.Shape[1:]...)...)
		copy(four.F32, x.F32)
		copy(four.F32[len(x.F32):], x.F32)
		inputs = append(inputs, one, four)
	}
	ctx := context.Background()
	var peak int64
	for round := 0; round < 12; round++ {
		misses := g.arena.misses
		for _, in := range inputs {
			p, err := g.Run(ctx, map[string]*tensor.Tensor{meta.Input: in}, RunOptions{})
			if err != nil {
				t.Fatal(err)
			}
			peak = max(peak, p.peakBytes)
			now, most, _ := g.arena.held()
			if int64(most) > arenaPeakFactor*peak || int64(now) > arenaPeakFactor*peak {
				t.Fatalf("round %d: arena holds %d bytes (high-water %d), one pass's peak live bytes are %d", round, now, most, peak)
			}
		}
		// The graph outputs go to the caller and never come back.
		if n, most := g.arena.misses-misses, len(inputs)*len(g.Outputs()); round > 1 && n > most {
			t.Errorf("round %d: %d fresh buffers in %d warm passes, want at most %d (the outputs)", round, n, len(inputs), most)
		}
	}
}
