package engine

import (
	"runtime"
	"sync"

	"heedmap/kernel"
)

// defaultGEMM is the GEMM operators use unless WithGEMM says otherwise: the
// fastest packed kernel for this CPU.
func defaultGEMM() kernel.GEMM { return kernel.Best() }

// teamGEMM is a packed GEMM whose parallel products run their slabs on a
// Graph's team (kernel.Packed.SgemmOn) rather than on goroutines started
// per call, which had to wait for a core the team's idle helper was still
// spinning on: ResNet-18 forward+backward at batch 1, whose strided
// layers' input gradients are such products, ran about 4 % faster
// (DEVELOPERS.md).
type teamGEMM struct {
	p  *kernel.Packed
	tm *team
}

func (t teamGEMM) Sgemm(transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	t.p.SgemmOn(t.tm, transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// onTeam returns gemm running on tm when it is a packed GEMM, else gemm.
func onTeam(gemm kernel.GEMM, tm *team) kernel.GEMM {
	if p, ok := baseGEMM(gemm).(*kernel.Packed); ok && tm != nil {
		return teamGEMM{p, tm}
	}
	return gemm
}

// baseGEMM returns the GEMM a teamGEMM wraps, else gemm itself.
func baseGEMM(gemm kernel.GEMM) kernel.GEMM {
	if t, ok := gemm.(teamGEMM); ok {
		return t.p
	}
	return gemm
}

// rowGEMM is a simple multi-threaded GEMM, kept as a second, independent
// implementation for tests and comparisons (WithGEMM(rowGEMM{})): it packs op(A) and op(B) into row-major copies when transposed,
// then computes each row of C as a sum of scaled rows of B (an axpy inner
// loop that the compiler keeps in registers and streams through memory),
// splitting rows of C over GOMAXPROCS goroutines. It accumulates in float32.
type rowGEMM struct{}

func (rowGEMM) Sgemm(transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	if m == 0 || n == 0 {
		return
	}
	if transA {
		t := make([]float32, m*k)
		for p := 0; p < k; p++ {
			row := a[p*lda : p*lda+m]
			for i, v := range row {
				t[i*k+p] = v
			}
		}
		a, lda = t, k
	}
	if transB {
		t := make([]float32, k*n)
		for j := 0; j < n; j++ {
			row := b[j*ldb : j*ldb+k]
			for p, v := range row {
				t[p*n+j] = v
			}
		}
		b, ldb = t, n
	}
	rows := func(i0, i1 int) {
		for i := i0; i < i1; i++ {
			ci := c[i*ldc : i*ldc+n]
			if beta == 0 {
				clear(ci)
			} else if beta != 1 {
				for j := range ci {
					ci[j] *= beta
				}
			}
			ai := a[i*lda : i*lda+k]
			for p, av := range ai {
				if av == 0 {
					continue
				}
				s := alpha * av
				bp := b[p*ldb : p*ldb+n]
				for j, bv := range bp {
					ci[j] += s * bv
				}
			}
		}
	}
	splitWork(m, m*n*k, rows)
}

// splitWork splits [0, n) into contiguous chunks over GOMAXPROCS
// goroutines when work (a rough flop count) is large enough to pay for them.
func splitWork(n, work int, f func(i0, i1 int)) {
	workers := runtime.GOMAXPROCS(0)
	if workers > n {
		workers = n
	}
	if workers <= 1 || work < 1<<16 {
		f(0, n)
		return
	}
	var wg sync.WaitGroup
	chunk := (n + workers - 1) / workers
	for i0 := 0; i0 < n; i0 += chunk {
		i1 := min(i0+chunk, n)
		wg.Add(1)
		go func() {
			defer wg.Done()
			f(i0, i1)
		}()
	}
	wg.Wait()
}
