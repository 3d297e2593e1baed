package occlusion

import (
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/explain/explaintest"
	"heedmap/onnx"
	"heedmap/tensor"
)

func loadNet(tb testing.TB, path string) (explain.Network, *tensor.Tensor) {
	tb.Helper()
	g, err := engine.Load(filepath.Join(path, "model.onnx"))
	if err != nil {
		tb.Fatal(err)
	}
	net, err := explain.FromGraph(g, explain.GraphOptions{})
	if err != nil {
		tb.Fatal(err)
	}
	xb, _, err := onnx.LoadTensor(filepath.Join(path, "input.pb"))
	if err != nil {
		tb.Fatal(err)
	}
	c, h, w := xb.Shape[1], xb.Shape[2], xb.Shape[3]
	return net, tensor.FromFloat32(xb.F32[:c*h*w], 1, c, h, w)
}

// The incremental evaluator against brute force (FullForward) on the
// compact reference networks: the maps must agree up to float summation
// order, within 1e-5 of the map's largest magnitude (plus 1e-6 absolute
// for maps near zero).
func TestIncrementalMatchesFullForward(t *testing.T) {
	for _, name := range []string{"resnet18", "mobilenet_v2", "efficientnet_b0", "densenet121"} {
		t.Run(name, func(t *testing.T) {
			net, x := loadNet(t, filepath.Join("..", "testdata", "nets", name))
			var logged []string
			// Patch 7, stride 5 on 64²: 12×12 windows plus the edge ones;
			// image-mean fill so every window changes the input.
			o := Occlusion{Patch: 7, Stride: 5, Fill: FillImageMean, Evaluator: FullForward{BatchSize: 11}}
			full, err := o.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
			if err != nil {
				t.Fatal(err)
			}
			// MinSaving −1 forces the incremental path even where it saves
			// too little to be chosen by default.
			o.Evaluator = Incremental{BatchSize: 11, MinSaving: -1, Log: func(s string) { logged = append(logged, s) }}
			inc, err := o.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
			if err != nil {
				t.Fatal(err)
			}
			var scale, worst, energy float64
			for i, v := range full.Map.Data {
				scale = math.Max(scale, math.Abs(float64(v)))
				worst = math.Max(worst, math.Abs(float64(inc.Map.Data[i]-v)))
				energy += float64(v) * float64(v)
			}
			t.Logf("largest map value %.4g, largest difference %.3g; %d log lines, last %q", scale, worst, len(logged), logged[len(logged)-1])
			if energy == 0 {
				t.Fatal("the occlusion map is zero: the comparison proves nothing")
			}
			if worst > 1e-5*scale+1e-6 {
				t.Errorf("incremental map differs from brute force by %g (largest value %g)", worst, scale)
			}
		})
	}
}

// The default choice of path: ResNet-18's plan saves 2× of the
// multiply-adds and is used; EfficientNet-B0's squeeze-and-excitation
// blocks leave 1.13× (compact net), below MinSaving, so full passes are
// used. The map is the same either way.
func TestIncrementalChoosesPath(t *testing.T) {
	for _, c := range []struct {
		name        string
		incremental bool
	}{{"resnet18", true}, {"efficientnet_b0", false}} {
		net, x := loadNet(t, filepath.Join("..", "testdata", "nets", c.name))
		var logged []string
		o := Occlusion{Patch: 16, Stride: 8, Evaluator: Incremental{Log: func(s string) { logged = append(logged, s) }}}
		if _, err := o.Attribute(ctx, net, x, explain.Predicted(explain.Logit)); err != nil {
			t.Fatal(err)
		}
		last := logged[len(logged)-1]
		if got := !strings.Contains(last, "using full forward passes"); got != c.incremental {
			t.Errorf("%s: %q", c.name, last)
		}
	}
}

// A Network that is not a compiled graph is scored by FullForward: the
// linear closed form of TestOcclusionLinear still holds.
func TestIncrementalFallsBackForOtherNetworks(t *testing.T) {
	net := explaintest.NewLinear(3, 9, 9, 2, 5)
	x := explaintest.RandomInput(3, 9, 9, 6)
	a, err := Occlusion{Patch: 3, Stride: 2}.Attribute(ctx, net, x, explain.Class(1, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	b, err := Occlusion{Patch: 3, Stride: 2, Evaluator: Incremental{}}.Attribute(ctx, net, x, explain.Class(1, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	for i := range a.Map.Data {
		if a.Map.Data[i] != b.Map.Data[i] {
			t.Fatalf("pixel %d: %v, FullForward %v", i, b.Map.Data[i], a.Map.Data[i])
		}
	}
}

func cpuSeconds() float64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return math.NaN()
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano()).Seconds()
}

// BenchmarkOcclusionEvaluators times a whole occlusion map with each
// evaluator on the compact networks (64², patch 5, stride 2: 961 windows)
// and, when HEEDMAP_RESNET18 (HEEDMAP_MOBILENETV2, HEEDMAP_EFFICIENTNETB0)
// names a full-size export's model.onnx (testdata/reference/export_nets.py
// --full), at 224², patch 16, stride 8 (729 windows). It reports windows
// per second and CPU seconds per map.
func BenchmarkOcclusionEvaluators(b *testing.B) {
	type bnet struct{ name, dir string }
	var nets []bnet
	for _, n := range []string{"resnet18", "mobilenet_v2", "efficientnet_b0", "densenet121"} {
		nets = append(nets, bnet{n, filepath.Join("..", "testdata", "nets", n)})
	}
	for _, e := range [][2]string{{"HEEDMAP_RESNET18", "resnet18-224"}, {"HEEDMAP_MOBILENETV2", "mobilenet_v2-224"}, {"HEEDMAP_EFFICIENTNETB0", "efficientnet_b0-224"}} {
		if p := os.Getenv(e[0]); p != "" {
			nets = append(nets, bnet{e[1], filepath.Dir(p)})
		}
	}
	for _, n := range nets {
		net, x := loadNet(b, n.dir)
		for _, ev := range []struct {
			name string
			e    Evaluator
		}{{"full", FullForward{BatchSize: 16}}, {"incremental", Incremental{BatchSize: 16}}} {
			b.Run(fmt.Sprintf("%s/%s", n.name, ev.name), func(b *testing.B) {
				o := Occlusion{Fill: FillImageMean, Evaluator: ev.e}
				p, s := o.Geometry(x.Shape[3], x.Shape[2])
				wins := len(Windows(x.Shape[3], x.Shape[2], p, s))
				start, cpu0 := time.Now(), cpuSeconds()
				for b.Loop() {
					if _, err := o.Attribute(ctx, net, x, explain.Predicted(explain.Logit)); err != nil {
						b.Fatal(err)
					}
				}
				b.ReportMetric(float64(wins*b.N)/time.Since(start).Seconds(), "windows/s")
				// CPU time of the process: on a machine shared with other
				// jobs it compares the evaluators more steadily than wall
				// time.
				b.ReportMetric((cpuSeconds()-cpu0)/float64(b.N), "cpu-s/map")
			})
		}
	}
}

// Incremental maps are byte-identical across batch sizes: positions a
// batch recomputes only because its patches share one size are restored
// from the unoccluded pass, so a window's result never depends on its
// batch neighbours, even where patch kernels round differently from the
// runtime's (depthwise convolutions) or a Conv's windows are grouped into
// boxes differently in each batch (ResNet-18).
func TestIncrementalBatchInvariant(t *testing.T) {
	for _, name := range []string{"mobilenet_v2", "efficientnet_b0", "resnet18"} {
		net, x := loadNet(t, filepath.Join("..", "testdata", "nets", name))
		var ref []float32
		for _, bs := range []int{1, 16, 7} {
			r, err := Occlusion{Patch: 7, Stride: 5, Evaluator: Incremental{BatchSize: bs, MinSaving: -1}}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
			if err != nil {
				t.Fatal(err)
			}
			if ref == nil {
				ref = r.Map.Data
				continue
			}
			for i, v := range r.Map.Data {
				if v != ref[i] {
					t.Fatalf("%s: batch %d: pixel %d = %v, batch 1 gives %v", name, bs, i, v, ref[i])
				}
			}
		}
	}
}
