package engine

import (
	"context"
	"math"
	"testing"

	"heedmap/tensor"
)

// TestBitMaskGradientExact runs the committed compact MobileNetV2 (ReLU6
// as Clip(0, 6) after every expansion and depthwise layer) at batch 1
// forward for backward, where its Clip outputs are kept as mask bits
// (bitmask.go), and checks that the input and layer gradients are bit for
// bit those of a pass that keeps every value as a tensor; that nearly all
// Clips did keep bits; and that Release hands them back.
func TestBitMaskGradientExact(t *testing.T) {
	n := loadCompactNet(t, "mobilenet_v2")
	per := n.x.Len() / n.x.Shape[0]
	x := tensor.FromFloat32(n.x.F32[:per], append([]int{1}, n.x.Shape[1:]...)...)
	feed := map[string]*tensor.Tensor{n.meta.Input: x}
	var all []string
	for v, name := range n.g.names {
		if n.g.producer[v] >= 0 {
			all = append(all, name)
		}
	}
	ctx := context.Background()
	grads := func(opt RunOptions) (*Pass, map[string]*tensor.Tensor) {
		opt.Backward = true
		p, err := n.g.Run(ctx, feed, opt)
		if err != nil {
			t.Fatal(err)
		}
		logits, _ := p.Value(n.meta.Output)
		seed := tensor.New(logits.Shape...)
		seed.F32[n.meta.Class] = 1
		g, err := p.Backward(ctx, map[string]*tensor.Tensor{n.meta.Output: seed}, []string{n.meta.Input, n.meta.Layer})
		if err != nil {
			t.Fatal(err)
		}
		return p, g
	}
	p, got := grads(RunOptions{})
	full, want := grads(RunOptions{Keep: all})
	if full.bits != nil {
		t.Fatal("a pass that keeps every value kept mask bits")
	}
	clips, withBits := 0, 0
	for _, nd := range n.g.nodes {
		if _, ok := nd.op.(*clipOp); ok {
			clips++
			if p.bits != nil && p.bits[nd.out[0]] != nil {
				withBits++
			}
		}
	}
	// The Clip whose output the kept layer is stays a tensor.
	if clips == 0 || withBits < clips-1 {
		t.Errorf("%d of %d Clip outputs kept as bits", withBits, clips)
	}
	for _, v := range []string{n.meta.Input, n.meta.Layer} {
		a, b := got[v].F32, want[v].F32
		for i := range a {
			if math.Float32bits(a[i]) != math.Float32bits(b[i]) {
				t.Fatalf("gradient of %s, element %d: %g from mask bits, %g keeping every tensor", v, i, a[i], b[i])
			}
		}
	}
	p.Release()
	for v, b := range p.bits {
		if b != nil {
			t.Fatalf("value %q: bits still held after Release", n.g.names[v])
		}
	}
}
