package engine

import (
	"context"
	"math"
	"testing"

	"heedmap/tensor"
)

// TestFusionMatchesUnfused checks that the committed compact ResNet-18
// (Conv→Relu) and MobileNetV2 (Conv→Clip) have fusable pairs, that a
// forward-only (fused) run reproduces PyTorch's logits, and that it is bit
// identical to a run that keeps every pre-activation value (so nothing
// is fused).
func TestFusionMatchesUnfused(t *testing.T) {
	for _, name := range []string{"resnet18", "mobilenet_v2"} {
		t.Run(name, func(t *testing.T) {
			n := loadCompactNet(t, name)
			meta, x, g := n.meta, n.x, n.g
			want := n.tensor(t, "logits.pb")
			if len(g.fusion.head) == 0 {
				t.Fatal("no Conv→activation pair found")
			}
			var heads []string
			for k := range g.fusion.head {
				heads = append(heads, g.names[g.nodes[k].out[0]])
			}
			ctx := context.Background()
			in := map[string]*tensor.Tensor{meta.Input: x}
			fused, err := g.Run(ctx, in, RunOptions{})
			if err != nil {
				t.Fatal(err)
			}
			plain, err := g.Run(ctx, in, RunOptions{Keep: heads})
			if err != nil {
				t.Fatal(err)
			}
			yf, _ := fused.Value(meta.Output)
			yp, _ := plain.Value(meta.Output)
			var num, den float64
			for i := range want.F32 {
				if yf.F32[i] != yp.F32[i] {
					t.Fatalf("logit %d: fused %v, unfused %v", i, yf.F32[i], yp.F32[i])
				}
				num = math.Max(num, math.Abs(float64(yf.F32[i])-float64(want.F32[i])))
				den = math.Max(den, math.Abs(float64(want.F32[i])))
			}
			// 1e-4: the float32 tolerance networks_test.go uses (common practice).
			if num/den > 1e-4 {
				t.Fatalf("fused logits differ from PyTorch by %.2e (relative)", num/den)
			}
			t.Logf("%d fused pairs", len(heads))
		})
	}
}
