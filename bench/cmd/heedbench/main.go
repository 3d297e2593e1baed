// Command heedbench is the driver of heedmap's side-by-side benchmark: it
// times heedmap's engine on full-size exported networks, runs the same
// networks through ONNX Runtime (bench/ort.js, Node) and PyTorch
// (bench/torch_bench.py) in the same run, and prints one Markdown table with
// images per second, GFLOP/s, the share of the machine's FMA peak measured in
// the same run, and the speed ratios the performance targets are stated in.
//
// Run it through bench/run.sh, which exports the networks and installs ONNX
// Runtime first. Every engine gets the same thread count (2), the same input
// image, a warm-up and then a fixed number of timed iterations; the engines
// run one after another, never concurrently.
//
// FLOP counts are the multiply-adds of the Conv, Gemm and MatMul nodes,
// counted from the ONNX graph with the shapes of a batch-1 pass (2 FLOP per
// multiply-add; elementwise, pooling and normalisation work is not counted).
// Forward+backward is counted as twice the forward: the gradient with
// respect to the input only needs one transposed product per forward
// product (no weight gradients), the convention attribution work uses.
package main

import (
	"context"
	"encoding/binary"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"slices"
	"strings"
	"time"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/kernel"
	"heedmap/occlusion"
	"heedmap/onnx"
	"heedmap/tensor"
)

// classIndex is the logit the gradients and the occlusion map explain; the
// reference script differentiates the same class.
const classIndex = 3

type config struct {
	nets, bench, work   string
	models              []string
	node, python        string
	threads             int
	warmup, iters1      int
	iters16             int
	occlusion           bool
	rounds              int
	evaluators          string
	skipORT, skipTorch  bool
	peakDur             time.Duration
	minTime             time.Duration
	patch, stride, occB int
}

// timing is one measured configuration.
type timing struct {
	model, pass, engine string
	batch, images       int
	seconds             float64
}

func (t timing) imgPerSec() float64 { return float64(t.images) / t.seconds }

type model struct {
	name   string
	path   string
	graph  *engine.Graph
	input  string
	output string
	shape  []int   // C, H, W
	gflop  float64 // forward, per image
	logits []float32
	one    *tensor.Tensor // first image of input.pb, [1, C, H, W]
}

func main() {
	var c config
	var models string
	flag.StringVar(&c.nets, "nets", "", "directory with the exported networks (<name>/model.onnx, <name>/input.pb)")
	flag.StringVar(&c.bench, "bench", "bench", "the bench folder (ort.js, torch_bench.py, node/)")
	flag.StringVar(&c.work, "work", "", "scratch directory (default: <nets>/../run)")
	flag.StringVar(&models, "models", "resnet18,mobilenet_v2", "comma-separated network names")
	flag.StringVar(&c.node, "node", "node", "Node.js executable")
	flag.StringVar(&c.python, "python", "/usr/bin/python3", "Python with Debian's python3-torch")
	flag.IntVar(&c.threads, "threads", 2, "threads for every engine")
	flag.IntVar(&c.warmup, "warmup", 1, "untimed warm-up iterations per configuration")
	flag.IntVar(&c.iters1, "iters1", 32, "timed iterations at batch 1")
	flag.IntVar(&c.iters16, "iters16", 4, "timed iterations at batch 16")
	flag.IntVar(&c.rounds, "rounds", 3, "rounds of all engines; the best round per configuration is reported")
	flag.BoolVar(&c.occlusion, "occlusion", true, "also time a full occlusion map (first model)")
	flag.StringVar(&c.evaluators, "evaluators", "full,incremental", "heedmap occlusion evaluators to time (full, incremental)")
	flag.IntVar(&c.patch, "patch", 16, "occlusion patch")
	flag.IntVar(&c.stride, "stride", 8, "occlusion stride")
	flag.IntVar(&c.occB, "occlusion-batch", 16, "occlusion windows per forward pass")
	flag.BoolVar(&c.skipORT, "skip-ort", false, "do not run ONNX Runtime")
	flag.BoolVar(&c.skipTorch, "skip-torch", false, "do not run PyTorch")
	flag.DurationVar(&c.peakDur, "peak", 2*time.Second, "duration of each FMA peak measurement")
	flag.DurationVar(&c.minTime, "min-time", time.Second, "least timed duration of each engine's turn: more iterations than -iters1/-iters16 run until it has passed")
	flag.Parse()
	c.models = strings.Split(models, ",")
	if c.nets == "" {
		fmt.Fprintln(os.Stderr, "heedbench: -nets is required (see bench/run.sh)")
		os.Exit(2)
	}
	if c.work == "" {
		c.work = filepath.Join(filepath.Dir(filepath.Clean(c.nets)), "run")
	}
	if c.warmup < 1 || c.iters1 < 1 || c.iters16 < 1 || c.threads < 1 || c.rounds < 1 {
		fmt.Fprintln(os.Stderr, "heedbench: -warmup, -iters1, -iters16, -threads and -rounds must be >= 1")
		os.Exit(2)
	}
	if err := run(context.Background(), c); err != nil {
		fmt.Fprintln(os.Stderr, "heedbench:", err)
		os.Exit(1)
	}
}

func logf(format string, a ...any) {
	fmt.Fprintf(os.Stderr, "%s "+format+"\n", append([]any{time.Now().Format("15:04:05")}, a...)...)
}

func run(ctx context.Context, c config) error {
	// Two threads for heedmap: the GEMM splits work over GOMAXPROCS
	// goroutines.
	runtime.GOMAXPROCS(c.threads)
	if err := os.MkdirAll(c.work, 0o755); err != nil {
		return err
	}
	start := time.Now()
	loadBefore := loadAvg()
	isa := kernel.ISAAVX2
	if kernel.Supported(kernel.ISAAVX512) {
		isa = kernel.ISAAVX512
	}
	peakBefore, err := kernel.MeasurePeak(ctx, isa, c.threads, c.peakDur)
	if err != nil {
		return err
	}
	logf("peak %v, %d threads: %.0f GFLOP/s", isa, c.threads, peakBefore)

	gemm := kernel.Best()
	var ms []*model
	var img *tensor.Tensor
	for _, name := range c.models {
		m, err := loadModel(ctx, c, name, gemm, img)
		if err != nil {
			return err
		}
		ms = append(ms, m)
		img = m.one
		logf("%s: %.3f GFLOP per image forward (Conv/Gemm/MatMul multiply-adds ×2)", name, m.gflop)
	}
	// One image for every engine: the first image of the exported input.
	imgPath := filepath.Join(c.work, "image.f32")
	if err := writeF32(imgPath, ms[0].one.F32); err != nil {
		return err
	}

	// Reference engines run as workers for the whole benchmark.
	var ort, torch *worker
	var ortVersion, torchVersion string
	if !c.skipORT {
		var hello struct {
			Version string `json:"ort_version"`
		}
		logf("ONNX Runtime (node %s)", filepath.Join(c.bench, "ort.js"))
		if ort, err = startWorker("ort", &hello, c.node, filepath.Join(c.bench, "ort.js")); err != nil {
			return err
		}
		ortVersion = hello.Version
	}
	if !c.skipTorch {
		var hello struct {
			Version string `json:"torch_version"`
		}
		logf("PyTorch (%s %s)", c.python, filepath.Join(c.bench, "torch_bench.py"))
		if torch, err = startWorker("torch", &hello, c.python, filepath.Join(c.bench, "torch_bench.py")); err != nil {
			return err
		}
		torchVersion = hello.Version
	}
	ortLogits, torchLogits := map[string][]float32{}, map[string][]float32{}
	// The reference engines' turns; ONNX Runtime times forward passes only.
	externals := []struct {
		engine   string
		w        *worker
		backward bool
		logits   map[string][]float32
	}{{"onnxruntime", ort, false, ortLogits}, {"pytorch", torch, true, torchLogits}}

	// Rounds: in each round every configuration (model, pass, batch) gets
	// one turn per engine, the turns back to back, so the engines compared
	// in a ratio run within seconds of each other and see the machine in
	// the same state; the order of the turns is reversed every other round.
	// The best round is kept per engine and configuration, so a burst of
	// load from other users during one turn does not decide a ratio
	// (best-of-N, common practice for timing on shared machines).
	var rows []timing
	var pairs []pairRatio
	for r := 0; r < c.rounds; r++ {
		logf("round %d of %d", r+1, c.rounds)
		for _, m := range ms {
			for _, bwd := range []bool{false, true} {
				for _, b := range []int{1, 16} {
					turns := []turn{{"heedmap", func() (timing, error) { return timeHeedmap(ctx, c, m, b, bwd) }}}
					for _, x := range externals {
						if x.w == nil || bwd && !x.backward {
							continue
						}
						turns = append(turns, turn{x.engine, func() (timing, error) {
							t, lg, err := timeExternal(c, x.w, x.engine, m, imgPath, b, bwd)
							if b == 1 && !bwd {
								x.logits[m.name] = lg
							}
							return t, err
						}})
					}
					if r%2 == 1 {
						slices.Reverse(turns)
					}
					got := map[string]timing{}
					for i, tn := range turns {
						if i > 0 {
							// Let the previous engine's idle threads stop
							// spinning before the next one starts.
							time.Sleep(settle)
						}
						t, err := tn.run()
						if err != nil {
							return err
						}
						logf("%s %s %s b%d: %.2f img/s", tn.engine, m.name, t.pass, b, t.imgPerSec())
						rows = best(rows, t)
						got[tn.engine] = t
					}
					other := "onnxruntime"
					if bwd {
						other = "pytorch"
					}
					if h, ok := got["heedmap"]; ok {
						if o, ok := got[other]; ok {
							pairs = append(pairs, pairRatio{model: m.name, pass: h.pass, batch: b, ratio: h.imgPerSec() / o.imgPerSec()})
						}
					}
				}
			}
		}
	}

	// The occlusion comparison runs once: ONNX Runtime's, then heedmap's.
	var occs []*occlusionResult
	if c.occlusion {
		var ortOcc *ortOcclusion
		ortMap := filepath.Join(c.work, "occlusion_ort.f32")
		if ort != nil {
			if ortOcc, err = ortOcclusionMap(c, ort, ms[0], imgPath, ortMap); err != nil {
				return err
			}
		}
		for _, ev := range strings.Split(c.evaluators, ",") {
			occ, err := timeOcclusion(ctx, c, ms[0], ev)
			if err != nil {
				return err
			}
			if ortOcc != nil {
				occ.ort = ortOcc
				if err := occ.compare(ortMap); err != nil {
					return err
				}
			}
			occs = append(occs, occ)
		}
	}
	for _, w := range []*worker{ort, torch} {
		if w != nil {
			if err := w.close(); err != nil {
				return err
			}
		}
	}

	peakAfter, err := kernel.MeasurePeak(ctx, isa, c.threads, c.peakDur)
	if err != nil {
		return err
	}
	loadAfter := loadAvg()
	peak := (peakBefore + peakAfter) / 2

	// Report.
	fmt.Printf("## Side-by-side run, %s\n\n", start.UTC().Format("2006-01-02 15:04 MST"))
	fmt.Printf("- CPU: %s, %d logical CPUs; every engine on %d threads\n", cpuModel(), runtime.NumCPU(), c.threads)
	fmt.Printf("- Go %s %s/%s; heedmap GEMM path %v", runtime.Version(), runtime.GOOS, runtime.GOARCH, gemm.ISA())
	if ort != nil {
		fmt.Printf("; ONNX Runtime %s (onnxruntime-node)", ortVersion)
	}
	if torch != nil {
		fmt.Printf("; PyTorch %s", torchVersion)
	}
	fmt.Println()
	fmt.Printf("- load average (1, 5, 15 min) before: %s; after: %s\n", loadBefore, loadAfter)
	fmt.Printf("- FMA peak (%v, register-only loop, %d threads, measured in this run): %.0f GFLOP/s before, %.0f after; %% of peak uses their mean, %.0f\n",
		isa, c.threads, peakBefore, peakAfter, peak)
	fmt.Printf("- forward work counted from the ONNX graphs:")
	for _, m := range ms {
		fmt.Printf(" %s %.3f GFLOP/image;", m.name, m.gflop)
	}
	fmt.Printf(" forward+backward (gradient to the input) counted as 2× forward\n")
	fmt.Printf("- iterations: %d warm-up, then at least %d timed at batch 1 and %d at batch 16 and for at least %v, per engine and configuration; best of %d rounds; in each round a configuration's turns of all engines run back to back, %v apart (heedmap, ONNX Runtime, PyTorch; the reverse order in even rounds)\n", c.warmup, c.iters1, c.iters16, c.minTime, c.rounds, settle)
	fmt.Printf("- wall time of the whole run: %s\n\n", time.Since(start).Round(time.Second))

	gflop := map[string]float64{}
	for _, m := range ms {
		gflop[m.name] = m.gflop
	}
	fmt.Println("| model | batch | pass | engine | img/s | GFLOP/s | % of peak |")
	fmt.Println("|---|---:|---|---|---:|---:|---:|")
	for _, m := range ms {
		for _, pass := range []string{"forward", "fwd+bwd"} {
			for _, b := range []int{1, 16} {
				for _, eng := range []string{"heedmap", "onnxruntime", "pytorch"} {
					t, ok := find(rows, m.name, pass, eng, b)
					if !ok {
						continue
					}
					f := gflop[m.name] * t.imgPerSec()
					if pass == "fwd+bwd" {
						f *= 2
					}
					fmt.Printf("| %s | %d | %s | %s | %.1f | %.1f | %.1f |\n", m.name, b, pass, eng, t.imgPerSec(), f, 100*f/peak)
				}
			}
		}
	}

	fmt.Print("\n### Ratios against the targets\n\n")
	fmt.Println("| ratio | model | batch | measured (best turns) | target | round by round |")
	fmt.Println("|---|---|---:|---:|---:|---|")
	for _, m := range ms {
		for _, b := range []int{1, 16} {
			h, ok1 := find(rows, m.name, "forward", "heedmap", b)
			o, ok2 := find(rows, m.name, "forward", "onnxruntime", b)
			if ok1 && ok2 {
				fmt.Printf("| heedmap / ONNX Runtime, forward img/s | %s | %d | %.3f | ≥ 0.7 | %s |\n", m.name, b, h.imgPerSec()/o.imgPerSec(), perRound(pairs, m.name, "forward", b))
			}
		}
	}
	for _, m := range ms {
		want := "≥ 1.5"
		if strings.HasPrefix(m.name, "mobilenet") {
			want = "≥ 3"
		}
		for _, b := range []int{1, 16} {
			h, ok1 := find(rows, m.name, "fwd+bwd", "heedmap", b)
			p, ok2 := find(rows, m.name, "fwd+bwd", "pytorch", b)
			if ok1 && ok2 {
				fmt.Printf("| heedmap / PyTorch, forward+backward img/s | %s | %d | %.3f | %s | %s |\n", m.name, b, h.imgPerSec()/p.imgPerSec(), want, perRound(pairs, m.name, "fwd+bwd", b))
			}
		}
	}
	for _, occ := range occs {
		if occ.ort != nil {
			fmt.Printf("| ONNX Runtime time / heedmap time, occlusion map (%s evaluator) | %s | %d | %.3f | ≥ 1.2 | |\n", occ.evaluator, occ.model, occ.batch, occ.ort.Seconds/occ.seconds)
		}
	}
	for i, occ := range occs {
		if i == 0 {
			fmt.Printf("\n### Occlusion map (%s, %d×%d, patch %d, stride %d: %d windows, batch %d, class %d logit, fill = model-space zero)\n\n",
				occ.model, occ.w, occ.h, c.patch, c.stride, occ.windows, occ.batch, classIndex)
			if occ.ort != nil {
				fmt.Printf("- ONNX Runtime (the same windows as ordinary batched forward passes): %.1f s (%.1f windows/s)\n", occ.ort.Seconds, float64(occ.ort.Windows)/occ.ort.Seconds)
			}
		}
		fmt.Printf("- heedmap, occlusion package, %s evaluator: %.1f s (%.1f windows/s)", occ.evaluator, occ.seconds, float64(occ.windows)/occ.seconds)
		if occ.ort != nil {
			fmt.Printf("; map vs ONNX Runtime's: max |Δ| = %.3g, max |ORT map| = %.3g, relative L2 = %.3g, unoccluded score %.6g vs %.6g: %s",
				occ.maxDiff, occ.maxRef, occ.relL2, occ.base, occ.ort.Base, occ.verdict)
		}
		fmt.Println()
	}
	if len(ms) > 0 {
		fmt.Print("\n### Logit agreement (batch 1, same image, max |Δ| against heedmap)\n\n")
		for _, m := range ms {
			fmt.Printf("- %s:", m.name)
			if ort != nil {
				fmt.Printf(" ONNX Runtime %.3g;", maxAbsDiff(m.logits, ortLogits[m.name]))
			}
			if torch != nil {
				fmt.Printf(" PyTorch %.3g;", maxAbsDiff(m.logits, torchLogits[m.name]))
			}
			fmt.Printf(" (max |logit| %.3g)\n", maxAbs(m.logits))
		}
	}
	return nil
}

// settle is the pause between two engines' turns.
const settle = 100 * time.Millisecond

// turn is one engine's timing of one configuration.
type turn struct {
	engine string
	run    func() (timing, error)
}

// pairRatio is heedmap's rate over the compared engine's in one round.
type pairRatio struct {
	model, pass string
	batch       int
	ratio       float64
}

// perRound lists the round-by-round ratios of one configuration.
func perRound(pairs []pairRatio, model, pass string, batch int) string {
	var s []string
	for _, p := range pairs {
		if p.model == model && p.pass == pass && p.batch == batch {
			s = append(s, fmt.Sprintf("%.2f", p.ratio))
		}
	}
	return strings.Join(s, ", ")
}

func (c config) iters(batch int) int {
	if batch > 1 {
		return c.iters16
	}
	return c.iters1
}

// best adds t to rows, or replaces the same configuration's entry when t
// is faster.
func best(rows []timing, t timing) []timing {
	for i, r := range rows {
		if r.model == t.model && r.pass == t.pass && r.engine == t.engine && r.batch == t.batch {
			if t.imgPerSec() > r.imgPerSec() {
				rows[i] = t
			}
			return rows
		}
	}
	return append(rows, t)
}

func find(rows []timing, model, pass, eng string, batch int) (timing, bool) {
	for _, t := range rows {
		if t.model == model && t.pass == pass && t.engine == eng && t.batch == batch {
			return t, true
		}
	}
	return timing{}, false
}

// ---------------------------------------------------------------- heedmap

// loadModel compiles <nets>/<name>/model.onnx and runs it once on img
// [1, C, H, W], or when img is nil on the first image of the export's
// input.pb, to count its work and record its logits.
func loadModel(ctx context.Context, c config, name string, gemm kernel.GEMM, img *tensor.Tensor) (*model, error) {
	path := filepath.Join(c.nets, name, "model.onnx")
	g, err := engine.Load(path, engine.WithGEMM(gemm))
	if err != nil {
		return nil, err
	}
	ins, outs := g.Inputs(), g.Outputs()
	if len(ins) != 1 || len(outs) < 1 {
		return nil, fmt.Errorf("%s: want one input and a logits output, got %d inputs, %d outputs", path, len(ins), len(outs))
	}
	one := img
	if one == nil {
		x, _, err := onnx.LoadTensor(filepath.Join(c.nets, name, "input.pb"))
		if err != nil {
			return nil, err
		}
		if len(x.Shape) != 4 || x.DType != tensor.Float32 || x.Shape[0] < 1 {
			return nil, fmt.Errorf("%s: input.pb is %v, want float [N, C, H, W]", name, x.Shape)
		}
		one = tensor.FromFloat32(append([]float32(nil), x.F32[:tensor.Numel(x.Shape[1:])]...), append([]int{1}, x.Shape[1:]...)...)
	}
	m := &model{name: name, path: path, graph: g, input: ins[0].Name, output: outs[0].Name, shape: one.Shape[1:]}
	p, err := g.Run(ctx, map[string]*tensor.Tensor{m.input: one}, engine.RunOptions{})
	if err != nil {
		return nil, err
	}
	macs, err := countMACs(g, p, 1)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	m.gflop = 2 * macs / 1e9
	lt, _ := p.Value(m.output)
	m.logits = append([]float32(nil), lt.F32...)
	m.one = one
	return m, nil
}

// countMACs adds up the multiply-adds of Conv, Gemm and MatMul nodes using
// the shapes a pass produced, per image of a batch.
func countMACs(g *engine.Graph, p *engine.Pass, batch int) (float64, error) {
	shape := func(name string) ([]int, error) {
		s, ok := p.Shape(name)
		if !ok {
			return nil, fmt.Errorf("no shape for %q", name)
		}
		return s, nil
	}
	var macs float64
	for _, nd := range g.Model().Graph.Nodes {
		switch nd.OpType {
		case "Conv", "Gemm", "MatMul":
		default:
			continue
		}
		y, err := shape(nd.Outputs[0])
		if err != nil {
			return 0, fmt.Errorf("node %s (%s): %w", nd.Name, nd.OpType, err)
		}
		a, err := shape(nd.Inputs[0])
		if err != nil {
			return 0, fmt.Errorf("node %s (%s): %w", nd.Name, nd.OpType, err)
		}
		w, err := shape(nd.Inputs[1])
		if err != nil {
			return 0, fmt.Errorf("node %s (%s): %w", nd.Name, nd.OpType, err)
		}
		var perOut int // multiply-adds per output element
		switch nd.OpType {
		case "Conv": // W is [M, C/group, kH, kW, ...]
			perOut = tensor.Numel(w[1:])
		case "Gemm":
			perOut = a[1]
			if nd.Int("transA", 0) != 0 {
				perOut = a[0]
			}
		case "MatMul":
			perOut = a[len(a)-1]
		}
		macs += float64(tensor.Numel(y)) * float64(perOut)
	}
	return macs / float64(batch), nil
}

func (m *model) batch(n int) *tensor.Tensor {
	size := len(m.one.F32)
	x := tensor.New(append([]int{n}, m.shape...)...)
	for i := 0; i < n; i++ {
		copy(x.F32[i*size:], m.one.F32)
	}
	return x
}

func timeHeedmap(ctx context.Context, c config, m *model, b int, bwd bool) (timing, error) {
	x := m.batch(b)
	in := map[string]*tensor.Tensor{m.input: x}
	step := func() error {
		p, err := m.graph.Run(ctx, in, engine.RunOptions{Backward: bwd})
		if err != nil || !bwd {
			return err
		}
		lt, _ := p.Value(m.output)
		seed := tensor.New(lt.Shape...)
		k := lt.Shape[1]
		for i := 0; i < lt.Shape[0]; i++ {
			seed.F32[i*k+classIndex] = 1
		}
		g, err := p.Backward(ctx, map[string]*tensor.Tensor{m.output: seed}, []string{m.input})
		p.Release() // as explain does: kept values go back to the arena
		if err != nil {
			return err
		}
		if g[m.input] == nil {
			return errors.New("no input gradient")
		}
		m.graph.Recycle(g[m.input]) // as explain does once a batch's gradients are used
		return nil
	}
	pass := "forward"
	if bwd {
		pass = "fwd+bwd"
	}
	iters := c.iters(b)
	for range c.warmup {
		if err := step(); err != nil {
			return timing{}, fmt.Errorf("heedmap %s %s: %w", m.name, pass, err)
		}
	}
	t0 := time.Now()
	done := 0
	for ; done < iters || time.Since(t0) < c.minTime; done++ {
		if err := step(); err != nil {
			return timing{}, fmt.Errorf("heedmap %s %s: %w", m.name, pass, err)
		}
	}
	return timing{model: m.name, pass: pass, engine: "heedmap", batch: b, images: b * done, seconds: time.Since(t0).Seconds()}, nil
}

// ---------------------------------------------------------------- occlusion

type ortOcclusion struct {
	Model   string  `json:"model"`
	Windows int     `json:"windows"`
	Batch   int     `json:"batch"`
	Seconds float64 `json:"seconds"`
	Base    float64 `json:"base"`
}

type occlusionResult struct {
	evaluator      string
	model          string
	w, h           int
	windows, batch int
	seconds, base  float64
	m              explain.Map
	ort            *ortOcclusion
	maxDiff        float64
	maxRef, relL2  float64
	verdict        string
}

// timeOcclusion times one occlusion map of m's image with the named
// evaluator: "full" (FullForward, one batched forward pass per window
// batch) or "incremental" (exact incremental inference).
func timeOcclusion(ctx context.Context, c config, m *model, evaluator string) (*occlusionResult, error) {
	net, err := explain.FromGraph(m.graph, explain.GraphOptions{Input: m.input, Output: m.output})
	if err != nil {
		return nil, err
	}
	o := occlusion.Occlusion{Patch: c.patch, Stride: c.stride, BatchSize: c.occB}
	switch evaluator {
	case "full":
		o.Evaluator = occlusion.FullForward{BatchSize: c.occB}
	case "incremental":
		o.Evaluator = occlusion.Incremental{BatchSize: c.occB}
	default:
		return nil, fmt.Errorf("occlusion evaluator %q: want full or incremental", evaluator)
	}
	h, w := m.shape[1], m.shape[2]
	n := len(occlusion.Windows(w, h, c.patch, c.stride))
	logf("heedmap occlusion %s, %s evaluator: %d windows", m.name, evaluator, n)
	t0 := time.Now()
	r, err := o.Attribute(ctx, net, m.one, explain.Class(classIndex, explain.Logit))
	if err != nil {
		return nil, err
	}
	secs := time.Since(t0).Seconds()
	logf("heedmap occlusion: %.1f s", secs)
	return &occlusionResult{evaluator: evaluator, model: m.name, w: w, h: h, windows: n, batch: c.occB, seconds: secs, base: r.Score, m: r.Map}, nil
}

// compare checks heedmap's map against ONNX Runtime's. Each map value is a
// mean of differences of two logits, so its float32 error scales with the
// logits, not with the (possibly small) difference: the tolerance is
// 1e-3 relative to the map's largest value plus 1e-5 relative to the
// unoccluded score, about ten times the float32 differences seen between
// independent runtimes on these networks (common practice for comparing
// float32 inference engines, not a published bound).
func (r *occlusionResult) compare(path string) error {
	ref, err := readF32(path)
	if err != nil {
		return err
	}
	if len(ref) != len(r.m.Data) {
		return fmt.Errorf("%s: %d values, heedmap's map has %d", path, len(ref), len(r.m.Data))
	}
	var num, den float64
	mismatchedNaN := 0
	for i, v := range ref {
		a, b := math.IsNaN(float64(r.m.Data[i])), math.IsNaN(float64(v))
		if a || b {
			// Pixels no window covers are NaN in both maps.
			if a != b {
				mismatchedNaN++
			}
			continue
		}
		d := math.Abs(float64(r.m.Data[i]) - float64(v))
		r.maxDiff = math.Max(r.maxDiff, d)
		r.maxRef = math.Max(r.maxRef, math.Abs(float64(v)))
		num += d * d
		den += float64(v) * float64(v)
	}
	r.relL2 = math.Sqrt(num / den)
	tol := 1e-3*r.maxRef + 1e-5*math.Abs(r.ort.Base)
	if r.maxDiff <= tol && mismatchedNaN == 0 {
		r.verdict = fmt.Sprintf("agree (tolerance %.3g)", tol)
	} else {
		r.verdict = fmt.Sprintf("DIFFER (tolerance %.3g)", tol)
	}
	return nil
}

// ---------------------------------------------------------------- others

// worker is a reference engine's process (bench/ort.js or
// bench/torch_bench.py) kept running for the whole benchmark: the driver
// writes one JSON request per line on its stdin and reads one JSON reply
// per line from its stdout. Keeping it running lets each configuration's
// turns of all engines follow each other within seconds.
type worker struct {
	tag string
	cmd *exec.Cmd
	in  io.WriteCloser
	out *json.Decoder
}

// startWorker runs prog args... and decodes its greeting (the version
// line) into hello.
func startWorker(tag string, hello any, prog string, args ...string) (*worker, error) {
	cmd := exec.Command(prog, args...)
	cmd.Stderr = os.Stderr
	in, err := cmd.StdinPipe()
	if err != nil {
		return nil, err
	}
	out, err := cmd.StdoutPipe()
	if err != nil {
		return nil, err
	}
	if err := cmd.Start(); err != nil {
		return nil, fmt.Errorf("%s %s: %w", prog, strings.Join(args, " "), err)
	}
	w := &worker{tag: tag, cmd: cmd, in: in, out: json.NewDecoder(out)}
	if err := w.out.Decode(hello); err != nil {
		w.close()
		return nil, fmt.Errorf("%s: no greeting: %w", tag, err)
	}
	return w, nil
}

// call sends req and decodes the reply into resp.
func (w *worker) call(req, resp any) error {
	b, err := json.Marshal(req)
	if err != nil {
		return err
	}
	if _, err := w.in.Write(append(b, '\n')); err != nil {
		return fmt.Errorf("%s: %w", w.tag, err)
	}
	if err := w.out.Decode(resp); err != nil {
		return fmt.Errorf("%s: bad or missing reply: %w", w.tag, err)
	}
	return nil
}

// close ends the worker's input and waits for it to exit.
func (w *worker) close() error {
	w.in.Close()
	if err := w.cmd.Wait(); err != nil {
		return fmt.Errorf("%s: %w", w.tag, err)
	}
	return nil
}

// request is one timing request to a worker.
type request struct {
	Op       string `json:"op"`
	Name     string `json:"name"`
	Model    string `json:"model"`
	Image    string `json:"image"`
	Shape    []int  `json:"shape"`
	Class    int    `json:"class"`
	Cache    string `json:"cache,omitempty"`
	Threads  int    `json:"threads"`
	Batch    int    `json:"batch"`
	Backward bool   `json:"backward"`
	Warmup   int    `json:"warmup"`
	Iters    int    `json:"iters"`
	// MinSeconds: the worker goes on past Iters until this long has
	// passed, and replies with the iterations it ran.
	MinSeconds float64 `json:"min_seconds"`
}

type extRun struct {
	Name     string    `json:"name"`
	Batch    int       `json:"batch"`
	Backward bool      `json:"backward"`
	Iters    int       `json:"iters"`
	Seconds  float64   `json:"seconds"`
	Logits   []float32 `json:"logits"`
}

// timeExternal times one configuration on a worker.
func timeExternal(c config, w *worker, engineName string, m *model, imgPath string, b int, bwd bool) (timing, []float32, error) {
	pass := "forward"
	if bwd {
		pass = "fwd+bwd"
	}
	req := request{Op: "time", Name: m.name, Model: m.path, Image: imgPath, Shape: m.shape, Class: classIndex, Cache: c.work,
		Threads: c.threads, Batch: b, Backward: bwd, Warmup: c.warmup, Iters: c.iters(b), MinSeconds: c.minTime.Seconds()}
	var x extRun
	if err := w.call(req, &x); err != nil {
		return timing{}, nil, err
	}
	if x.Name != m.name || x.Batch != b || x.Iters < req.Iters || x.Seconds < req.MinSeconds {
		return timing{}, nil, fmt.Errorf("%s: reply %+v does not answer %s b%d", w.tag, x, m.name, b)
	}
	return timing{model: m.name, pass: pass, engine: engineName, batch: b, images: b * x.Iters, seconds: x.Seconds}, x.Logits, nil
}

// ortOcclusionMap asks the ONNX Runtime worker for the occlusion map of
// m's image, written to mapPath.
func ortOcclusionMap(c config, w *worker, m *model, imgPath, mapPath string) (*ortOcclusion, error) {
	req := map[string]any{
		"op": "occlusion", "model": m.path, "image": imgPath, "shape": m.shape, "threads": c.threads,
		"patch": c.patch, "stride": c.stride, "class": classIndex, "batch": c.occB, "out": mapPath,
	}
	logf("ONNX Runtime occlusion %s", m.name)
	var o ortOcclusion
	if err := w.call(req, &o); err != nil {
		return nil, err
	}
	return &o, nil
}

// ---------------------------------------------------------------- helpers

func writeF32(path string, v []float32) error {
	b := make([]byte, 4*len(v))
	for i, x := range v {
		binary.LittleEndian.PutUint32(b[4*i:], math.Float32bits(x))
	}
	return os.WriteFile(path, b, 0o644)
}

func readF32(path string) ([]float32, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, err
	}
	if len(b)%4 != 0 {
		return nil, fmt.Errorf("%s: %d bytes is not a float32 array", path, len(b))
	}
	v := make([]float32, len(b)/4)
	for i := range v {
		v[i] = math.Float32frombits(binary.LittleEndian.Uint32(b[4*i:]))
	}
	return v, nil
}

func maxAbsDiff(a, b []float32) float64 {
	if len(a) != len(b) {
		return math.NaN()
	}
	var m float64
	for i := range a {
		m = math.Max(m, math.Abs(float64(a[i])-float64(b[i])))
	}
	return m
}

func maxAbs(a []float32) float64 {
	var m float64
	for _, v := range a {
		m = math.Max(m, math.Abs(float64(v)))
	}
	return m
}

func loadAvg() string {
	b, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return "unknown"
	}
	f := strings.Fields(string(b))
	if len(f) < 3 {
		return "unknown"
	}
	return strings.Join(f[:3], " ")
}

func cpuModel() string {
	b, err := os.ReadFile("/proc/cpuinfo")
	if err != nil {
		return runtime.GOARCH
	}
	for _, line := range strings.Split(string(b), "\n") {
		if k, v, ok := strings.Cut(line, ":"); ok && strings.TrimSpace(k) == "model name" {
			return strings.TrimSpace(v)
		}
	}
	return runtime.GOARCH
}
