package engine

import (
	"math/rand"
	"testing"

	"heedmap/tensor"
)

// Benchmarks of the elementwise and resampling ops on activation-sized
// tensors (a 64-channel 112×112 feature map, as in the first stage of
// common image classifiers). They report output elements per second.

func benchOp(b *testing.B, op Op, in []*tensor.Tensor, backward bool) {
	out, err := op.Forward(in)
	if err != nil {
		b.Fatal(err)
	}
	g := []*tensor.Tensor{out[0].Clone()}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if backward {
			if _, err := op.(Differentiable).Backward(in, out, g); err != nil {
				b.Fatal(err)
			}
		} else if _, err := op.Forward(in); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(out[0].Len())*float64(b.N)/b.Elapsed().Seconds()/1e6, "Melem/s")
}

func benchInputs() (*tensor.Tensor, *tensor.Tensor) {
	rng := rand.New(rand.NewSource(1))
	return randTensor(rng, -1, 1, 1, 64, 112, 112), randTensor(rng, -1, 1, 1, 64, 1, 1)
}

func BenchmarkAddBiasBroadcast(b *testing.B) {
	x, bias := benchInputs()
	benchOp(b, &binaryOp{kind: binAdd}, []*tensor.Tensor{x, bias}, false)
}

func BenchmarkMulBroadcastBackward(b *testing.B) {
	x, s := benchInputs()
	benchOp(b, &binaryOp{kind: binMul}, []*tensor.Tensor{x, s}, true)
}

func BenchmarkRelu(b *testing.B) {
	x, _ := benchInputs()
	op, _ := buildRelu(nil, &Env{})
	benchOp(b, op, []*tensor.Tensor{x}, false)
}

// RISE-style mask upsampling: 7×7 → 224×224 bilinear, 16 masks.
func BenchmarkResizeBilinearUpsample(b *testing.B) {
	rng := rand.New(rand.NewSource(2))
	x := randTensor(rng, 0, 1, 16, 1, 7, 7)
	op := &resizeOp{opset: 13, mode: resizeLinear, coord: "half_pixel", nearest: "round_prefer_floor", aspect: "stretch"}
	benchOp(b, op, []*tensor.Tensor{x, nil, nil, i64s([]int{4}, 16, 1, 224, 224)}, false)
}

func BenchmarkConcatChannels(b *testing.B) {
	x, _ := benchInputs()
	benchOp(b, &concatOp{axis: 1}, []*tensor.Tensor{x, x, x}, false)
}
