package kernel

import (
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
)

// The reference is the BLAS definition of SGEMM (reference BLAS sgemm.f;
// Dongarra, Du Croz, Hammarling & Duff, "A set of level 3 basic linear
// algebra subprograms", ACM TOMS 16(1), 1990): C := alpha·op(A)·op(B) +
// beta·C with op(X) = X or Xᵀ, and when beta is zero C need not be set on
// input (so NaN/Inf in C must not propagate). kernel.Naive implements that
// definition directly, accumulating in float64; every path is compared
// with it here.
//
// Error bound: a float32 dot product of length k computed in any order
// satisfies |fl(xᵀy) − xᵀy| ≤ γ_k·|x|ᵀ|y| with γ_k = k·u/(1−k·u), u = 2⁻²⁴
// (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., §3.1).
// The alpha scaling and beta update add two more roundings, and the float64
// reference itself rounds twice more, so we allow
// (k+4)·u·(|alpha|·Σ_p|a_ip||b_pj| + |beta|·|c_ij|) per element.

type path struct {
	name string
	g    GEMM
}

// paths returns every GEMM path this build and CPU can run, each single- and
// two-threaded; the portable path is always present.
func paths(t testing.TB) []path {
	var ps []path
	for _, isa := range []ISA{ISAPortable, ISAAVX2, ISAAVX512} {
		if !Supported(isa) {
			t.Logf("%v not supported on this CPU; not tested", isa)
			continue
		}
		for _, th := range []int{1, 2} {
			g, err := New(Options{ISA: isa, Threads: th})
			if err != nil {
				t.Fatal(err)
			}
			ps = append(ps, path{fmt.Sprintf("%v/t%d", isa, th), g})
			if th == 2 {
				ps = append(ps, path{fmt.Sprintf("%v/t2/runner", isa), onRunner{g, &reverseRunner{}}})
			}
		}
	}
	ps = append(ps, path{"best", Best()}, path{"zero", new(Packed)})
	return ps
}

type shape struct{ m, n, k int }

// testShapes is every combination of m, n, k in {1, 7, 17, 33} plus chosen
// larger shapes; with HEEDMAP_LONG=1 it is the full cross product of
// {1, 7, 17, 33, 64, 100, 257} as well.
func testShapes() []shape {
	var ss []shape
	small := []int{1, 7, 17, 33}
	if os.Getenv("HEEDMAP_LONG") == "1" {
		small = []int{1, 7, 17, 33, 64, 100, 257}
	}
	for _, m := range small {
		for _, n := range small {
			for _, k := range small {
				ss = append(ss, shape{m, n, k})
			}
		}
	}
	return append(ss,
		shape{64, 64, 64}, shape{100, 100, 100}, shape{257, 257, 257},
		shape{100, 257, 33}, shape{257, 100, 17}, shape{33, 257, 100},
		shape{64, 7, 257}, shape{7, 64, 257}, shape{1, 257, 64}, shape{257, 1, 64},
		// last rows taken by an edge tile read in place (8 and 4 rows)
		shape{20, 33, 40}, shape{128, 49, 300}, shape{16, 70, 9},
		// more than one kc slice (256), mc block (192), nc block (1024 / 4096)
		shape{13, 17, 600}, shape{200, 40, 300}, shape{5, 4200, 9}, shape{9, 1100, 3},
		// large enough to be split across goroutines along n and along m
		shape{33, 1000, 40}, shape{600, 20, 100}, shape{64, 3136 / 4, 576 / 4},
	)
}

// mat is a row-major matrix with stride ld > cols; the padding holds a
// sentinel so writes outside the matrix are detected.
type mat struct {
	rows, cols, ld int
	v              []float32
}

const sentinel = float32(-12345.678)

func newMat(r *rand.Rand, rows, cols, pad int) mat {
	ld := max(1, cols) + pad
	n := 0
	if rows > 0 && cols > 0 {
		n = (rows-1)*ld + cols
	}
	x := mat{rows, cols, ld, make([]float32, n)}
	for i := range x.v {
		if i%ld < cols {
			x.v[i] = float32(r.NormFloat64())
		} else {
			x.v[i] = sentinel
		}
	}
	return x
}

func TestSgemmMatchesReference(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	ps := paths(t)
	for _, s := range testShapes() {
		for _, tr := range [][2]bool{{false, false}, {true, false}, {false, true}, {true, true}} {
			for bi, beta := range []float32{0, 1, 0.5} {
				alpha := float32(1.5)
				if bi == 1 {
					alpha = -0.75
				}
				ar, ac := s.m, s.k
				if tr[0] {
					ar, ac = s.k, s.m
				}
				br, bc := s.k, s.n
				if tr[1] {
					br, bc = s.n, s.k
				}
				a := newMat(r, ar, ac, 3)
				b := newMat(r, br, bc, 5)
				c0 := newMat(r, s.m, s.n, 2)
				if beta == 0 {
					for i := range c0.v {
						if i%c0.ld < s.n {
							c0.v[i] = float32(math.NaN())
						}
					}
				}
				want := append([]float32(nil), c0.v...)
				Naive{}.Sgemm(tr[0], tr[1], s.m, s.n, s.k, alpha, a.v, a.ld, b.v, b.ld, beta, want, c0.ld)
				bound := errBound(tr[0], tr[1], s, alpha, a, b, beta, c0)
				for _, p := range ps {
					got := append([]float32(nil), c0.v...)
					p.g.Sgemm(tr[0], tr[1], s.m, s.n, s.k, alpha, a.v, a.ld, b.v, b.ld, beta, got, c0.ld)
					name := fmt.Sprintf("%s m=%d n=%d k=%d tA=%v tB=%v alpha=%v beta=%v", p.name, s.m, s.n, s.k, tr[0], tr[1], alpha, beta)
					if err := compare(got, want, bound, c0.ld, s.n); err != nil {
						t.Fatalf("%s: %v", name, err)
					}
				}
			}
		}
	}
}

// errBound returns the per-element tolerance described at the top of the file.
func errBound(tA, tB bool, s shape, alpha float32, a, b mat, beta float32, c mat) []float64 {
	const u = 1.0 / (1 << 24)
	bound := make([]float64, len(c.v))
	for i := 0; i < s.m; i++ {
		for j := 0; j < s.n; j++ {
			var abs float64
			for p := 0; p < s.k; p++ {
				var av, bv float32
				if tA {
					av = a.v[p*a.ld+i]
				} else {
					av = a.v[i*a.ld+p]
				}
				if tB {
					bv = b.v[j*b.ld+p]
				} else {
					bv = b.v[p*b.ld+j]
				}
				abs += math.Abs(float64(av) * float64(bv))
			}
			abs *= math.Abs(float64(alpha))
			if beta != 0 {
				abs += math.Abs(float64(beta) * float64(c.v[i*c.ld+j]))
			}
			bound[i*c.ld+j] = float64(s.k+4)*u*abs + 1e-30
		}
	}
	return bound
}

func compare(got, want []float32, bound []float64, ld, n int) error {
	for i := range got {
		if i%ld >= n {
			if got[i] != sentinel {
				return fmt.Errorf("wrote %v into stride padding at %d", got[i], i)
			}
			continue
		}
		if math.IsNaN(float64(got[i])) || math.IsInf(float64(got[i]), 0) {
			return fmt.Errorf("element %d (row %d col %d) is %v, want %v", i, i/ld, i%ld, got[i], want[i])
		}
		if d := math.Abs(float64(got[i]) - float64(want[i])); d > bound[i] {
			return fmt.Errorf("element %d (row %d col %d) = %v, want %v (|diff| %g > bound %g)", i, i/ld, i%ld, got[i], want[i], d, bound[i])
		}
	}
	return nil
}

// TestSgemmDegenerate checks the reference BLAS quick-return rules: m or n
// zero touches nothing; k zero or alpha zero gives C = beta·C, with beta
// zero writing zeros without reading C.
func TestSgemmDegenerate(t *testing.T) {
	for _, p := range paths(t) {
		nan := float32(math.NaN())
		c := []float32{nan, 2, sentinel, 4, nan}
		p.g.Sgemm(false, false, 2, 2, 0, 1, nil, 1, nil, 2, 0, c, 3)
		if c[0] != 0 || c[1] != 0 || c[2] != sentinel || c[3] != 0 || c[4] != 0 {
			t.Errorf("%s: k=0 beta=0 gave %v", p.name, c)
		}
		c = []float32{1, 2, sentinel, 4, 5}
		a := []float32{nan, nan}
		b := []float32{1, 1}
		p.g.Sgemm(false, false, 2, 2, 1, 0, a, 1, b, 2, 0.5, c, 3)
		if c[0] != 0.5 || c[1] != 1 || c[2] != sentinel || c[3] != 2 || c[4] != 2.5 {
			t.Errorf("%s: alpha=0 beta=0.5 gave %v", p.name, c)
		}
		c = []float32{7}
		p.g.Sgemm(true, true, 0, 1, 3, 1, nil, 1, []float32{1, 2, 3}, 3, 0, c, 1)
		if c[0] != 7 {
			t.Errorf("%s: m=0 wrote C: %v", p.name, c)
		}
	}
}

// TestSgemmBadArguments checks that a slice too short for its stated shape
// is rejected before any SIMD code can read past it.
func TestSgemmBadArguments(t *testing.T) {
	for _, p := range paths(t) {
		for name, call := range map[string]func(){
			"short A": func() {
				p.g.Sgemm(false, false, 40, 40, 40, 1, make([]float32, 1599), 40, make([]float32, 1600), 40, 0, make([]float32, 1600), 40)
			},
			"short C": func() {
				p.g.Sgemm(false, false, 40, 40, 40, 1, make([]float32, 1600), 40, make([]float32, 1600), 40, 0, make([]float32, 1599), 40)
			},
			"lda": func() {
				p.g.Sgemm(true, false, 4, 4, 4, 1, make([]float32, 16), 3, make([]float32, 16), 4, 0, make([]float32, 16), 4)
			},
			"neg m": func() { p.g.Sgemm(false, false, -1, 4, 4, 1, nil, 4, make([]float32, 16), 4, 0, nil, 4) },
		} {
			msg := func() (msg string) {
				defer func() { msg = fmt.Sprint(recover()) }()
				call()
				return ""
			}()
			if !strings.HasPrefix(msg, "kernel: ") {
				t.Errorf("%s %s: got panic %q, want a kernel argument error", p.name, name, msg)
			}
		}
	}
}

// TestSgemmSteadyStateAllocs checks that packing buffers are reused: a
// single-threaded call allocates nothing once warm, and a two-thread call
// only what starting one goroutine costs (its closure: 1).
// AllocsPerRun sets GOMAXPROCS to 1, so the GOMAXPROCS-sized paths run
// single-threaded here.
func TestSgemmSteadyStateAllocs(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	m, n, k := 96, 160, 300
	a, b, c := newMat(r, m, k, 0), newMat(r, k, n, 0), newMat(r, m, n, 0)
	for _, p := range paths(t) {
		if o, ok := p.g.(onRunner); ok {
			// The path's runner starts goroutines; SgemmOn's own cost
			// is measured with one that does not.
			p.g = onRunner{o.p, inOrder{}}
		}
		limit := 0.0
		if !strings.HasSuffix(p.name, "/t1") {
			limit = 1
		}
		allocs := testing.AllocsPerRun(20, func() {
			p.g.Sgemm(false, false, m, n, k, 1, a.v, a.ld, b.v, b.ld, 0, c.v, c.ld)
		})
		if allocs > limit {
			t.Errorf("%s: %v allocations per call, want <= %v", p.name, allocs, limit)
		}
	}
}

func TestNewRejects(t *testing.T) {
	if _, err := New(Options{Threads: -1}); err == nil {
		t.Error("Threads -1 accepted")
	}
	if _, err := New(Options{ISA: ISA(99)}); err == nil {
		t.Error("unknown ISA accepted")
	}
	if g := Best(); !Supported(g.ISA()) || (Supported(ISAAVX512) && g.ISA() != ISAAVX512) {
		t.Errorf("Best picked %v", g.ISA())
	}
}

// TestSgemmConcurrentUse runs one GEMM value from several goroutines at
// once (as parallel explanation workers do); each must get its own
// packing buffers. Run under -race to check the pool use.
func TestSgemmConcurrentUse(t *testing.T) {
	r := rand.New(rand.NewPCG(13, 14))
	m, n, k := 37, 70, 300
	a, b := newMat(r, m, k, 1), newMat(r, k, n, 2)
	want := make([]float32, m*n)
	Naive{}.Sgemm(false, false, m, n, k, 1, a.v, a.ld, b.v, b.ld, 0, want, n)
	bound := errBound(false, false, shape{m, n, k}, 1, a, b, 0, mat{m, n, n, want})
	for _, p := range paths(t) {
		const workers = 4
		errs := make(chan error, workers)
		for w := 0; w < workers; w++ {
			go func() {
				c := make([]float32, m*n)
				for range 5 {
					p.g.Sgemm(false, false, m, n, k, 1, a.v, a.ld, b.v, b.ld, 0, c, n)
					if err := compare(c, want, bound, n, n); err != nil {
						errs <- err
						return
					}
				}
				errs <- nil
			}()
		}
		for w := 0; w < workers; w++ {
			if err := <-errs; err != nil {
				t.Fatalf("%s: %v", p.name, err)
			}
		}
	}
}

// onRunner is a GEMM whose products run on a Runner (Packed.SgemmOn).
type onRunner struct {
	p *Packed
	r Runner
}

func (o onRunner) Sgemm(transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	o.p.SgemmOn(o.r, transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// reverseRunner runs the tasks of a call concurrently, starting them last
// to first, and counts the calls and tasks it was given.
type reverseRunner struct {
	calls, tasks atomic.Int64
}

func (r *reverseRunner) Run(tasks int, task func(t int)) {
	r.calls.Add(1)
	r.tasks.Add(int64(tasks))
	var wg sync.WaitGroup
	for t := tasks - 1; t >= 0; t-- {
		wg.Add(1)
		go func() {
			defer wg.Done()
			task(t)
		}()
	}
	wg.Wait()
}

// inOrder runs the tasks one after another on the caller's goroutine.
type inOrder struct{}

func (inOrder) Run(tasks int, task func(t int)) {
	for t := range tasks {
		task(t)
	}
}

// TestSgemmOnRunner checks that SgemmOn hands a parallel product's slabs
// to the runner, and that the result is bit for bit Sgemm's with the same
// thread count (each slab of C is computed alike whoever runs it).
func TestSgemmOnRunner(t *testing.T) {
	r := rand.New(rand.NewPCG(15, 16))
	for _, isa := range []ISA{ISAPortable, ISAAVX2, ISAAVX512} {
		if !Supported(isa) {
			continue
		}
		g, err := New(Options{ISA: isa, Threads: 2})
		if err != nil {
			t.Fatal(err)
		}
		for _, s := range []shape{{33, 1000, 40}, {600, 20, 100}, {257, 257, 257}} {
			for _, tA := range []bool{false, true} {
				for _, tB := range []bool{false, true} {
					ar, ac := s.m, s.k
					if tA {
						ar, ac = ac, ar
					}
					br, bc := s.k, s.n
					if tB {
						br, bc = bc, br
					}
					a, b := newMat(r, ar, ac, 1), newMat(r, br, bc, 2)
					c0 := newMat(r, s.m, s.n, 0)
					want := append([]float32(nil), c0.v...)
					got := append([]float32(nil), c0.v...)
					g.Sgemm(tA, tB, s.m, s.n, s.k, 0.5, a.v, a.ld, b.v, b.ld, 0.25, want, c0.ld)
					var run reverseRunner
					g.SgemmOn(&run, tA, tB, s.m, s.n, s.k, 0.5, a.v, a.ld, b.v, b.ld, 0.25, got, c0.ld)
					if run.calls.Load() != 1 || run.tasks.Load() < 2 {
						t.Fatalf("%v %v tA=%v tB=%v: runner got %d calls, %d tasks; want 1 call of several tasks", isa, s, tA, tB, run.calls.Load(), run.tasks.Load())
					}
					for i := range want {
						if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
							t.Fatalf("%v %v tA=%v tB=%v: C[%d] = %v on the runner, %v from Sgemm", isa, s, tA, tB, i, got[i], want[i])
						}
					}
				}
			}
		}
	}
}
