package kernel_test

import (
	"math"
	"math/rand/v2"
	"testing"

	"heedmap/kernel"
)

// TestSgemmRowPanels checks the product with both operands packed
// against kernel.Naive (the reference BLAS definition, C = A·B) within
// the error bound of packed_test.go ((k+4)·u·Σ|a||b|, Higham §3.1), for
// row counts that hit full tiles, each edge tile and none, and column
// counts with a partial last panel, on every path this CPU has.
func TestSgemmRowPanels(t *testing.T) {
	r := rand.New(rand.NewPCG(11, 12))
	for _, isa := range []kernel.ISA{kernel.ISAPortable, kernel.ISAAVX2, kernel.ISAAVX512} {
		if !kernel.Supported(isa) {
			continue
		}
		g, err := kernel.New(kernel.Options{ISA: isa, Threads: 1})
		if err != nil {
			t.Fatal(err)
		}
		mr, nr := g.Tile()
		for _, m := range []int{1, 3, mr - 1, mr, mr + 1, mr + 4, 2*mr + 7, 49, 196} {
			for _, n := range []int{nr, nr + 5, 3 * nr, 7} {
				for _, k := range []int{1, 37, 300, 600} {
					a := randSlice(r, m*k)
					w := randSlice(r, n*k) // B = wᵀ
					ap := packRowPanels(g, a, m, k)
					bp := make([]float32, (n+nr-1)/nr*nr*k)
					g.PackColumnPanels(bp, w, n, k, k)
					c := make([]float32, m*(n+3))
					for i := range c {
						c[i] = 7 // overwritten
					}
					g.SgemmRowPanels(m, n, k, ap, bp, c, n+3)
					want := make([]float32, m*n)
					kernel.Naive{}.Sgemm(false, true, m, n, k, 1, a, k, w, k, 0, want, n)
					for i := 0; i < m; i++ {
						for j := 0; j < n; j++ {
							var mag float64
							for kk := 0; kk < k; kk++ {
								mag += abs64(float64(a[i*k+kk]) * float64(w[j*k+kk]))
							}
							bound := float64(k+4) * 0x1p-24 * mag
							if d := abs64(float64(c[i*(n+3)+j]) - float64(want[i*n+j])); d > bound {
								t.Fatalf("%v m=%d n=%d k=%d: C[%d][%d] = %v, want %v (bound %.2g)", isa, m, n, k, i, j, c[i*(n+3)+j], want[i*n+j], bound)
							}
						}
					}
				}
			}
		}
	}
}

// packRowPanels packs the row-major m×k matrix a as RowPanels says: panel
// i holds rows i·mr … as k×width, row fastest. Padding rows hold 99, which
// must never reach C's valid rows.
func packRowPanels(g *kernel.Packed, a []float32, m, k int) []float32 {
	mr, _ := g.Tile()
	_, full, edge := g.RowPanels(m)
	ap := make([]float32, g.RowPanelsLen(m, k))
	for i := range ap {
		ap[i] = 99
	}
	for row := 0; row < m; row++ {
		p, width := row/mr, mr
		if p == full {
			width = edge
		}
		for kk := 0; kk < k; kk++ {
			ap[p*k*mr+kk*width+row-p*mr] = a[row*k+kk]
		}
	}
	return ap
}

// TestSgemmKMajor checks that multiplying an A read in place k-major
// (A(i, p) at a[p·lda + i]) gives bit for bit what lowering it into row
// panels and calling SgemmRowPanels gives (itself checked against
// kernel.Naive above), for row counts with and without an edge panel,
// partial last B panels and several k blocks.
func TestSgemmKMajor(t *testing.T) {
	r := rand.New(rand.NewPCG(13, 14))
	g, err := kernel.New(kernel.Options{ISA: kernel.ISAAVX512, Threads: 1})
	if err != nil {
		t.Skip("no AVX-512 path on this CPU")
	}
	mr, nr := g.Tile()
	for _, m := range []int{1, 5, mr, mr + 1, 2*mr + 7, 49, 196} {
		for _, n := range []int{nr, nr + 5, 3 * nr, 7} {
			for _, k := range []int{1, 37, 300, 600} {
				lda := m + 3
				at := randSlice(r, (k-1)*lda+m) // k-major: row p holds A(·, p)
				a := make([]float32, m*k)       // the same A, row-major
				for i := 0; i < m; i++ {
					for p := 0; p < k; p++ {
						a[i*k+p] = at[p*lda+i]
					}
				}
				w := randSlice(r, n*k)
				bp := make([]float32, (n+nr-1)/nr*nr*k)
				g.PackColumnPanels(bp, w, n, k, k)
				want := make([]float32, m*n)
				g.SgemmRowPanels(m, n, k, packRowPanels(g, a, m, k), bp, want, n)
				got := make([]float32, m*(n+2))
				for i := range got {
					got[i] = 7
				}
				if !g.SgemmKMajor(m, n, k, at, lda, bp, got, n+2) {
					t.Fatal("AVX-512 path has no k-major kernel")
				}
				for i := 0; i < m; i++ {
					for j := 0; j < n+2; j++ {
						v := got[i*(n+2)+j]
						if j >= n {
							if v != 7 {
								t.Fatalf("m=%d n=%d k=%d: C[%d][%d] past n written: %v", m, n, k, i, j, v)
							}
							continue
						}
						if math.Float32bits(v) != math.Float32bits(want[i*n+j]) {
							t.Fatalf("m=%d n=%d k=%d: C[%d][%d] = %v, row panels %v", m, n, k, i, j, v, want[i*n+j])
						}
					}
				}
			}
		}
	}
}

func abs64(x float64) float64 {
	if x < 0 {
		return -x
	}
	return x
}

// BenchmarkSgemmRowPanels compares, on the late ResNet layers' products at
// batch 1 (M output channels, N positions, K = C·9), the usual orientation
// (Y = W·col through SgemmPanels, W read in place) with the transposed
// one (Yᵀ = colᵀ·Wᵀ through SgemmRowPanels, W packed once), one core,
// packing excluded. Compare the two within one run.
func BenchmarkSgemmRowPanels(b *testing.B) {
	g := kernel.Best()
	_, nr := g.Tile()
	for _, sh := range []struct {
		name    string
		m, n, k int
	}{{"7x7", 512, 49, 4608}, {"14x14", 256, 196, 2304}, {"28x28", 128, 784, 1152}} {
		w := make([]float32, sh.m*sh.k)
		panels := make([]float32, (sh.n+nr-1)/nr*nr*sh.k)
		c := make([]float32, sh.m*sh.n)
		flops := 2 * float64(sh.m*sh.n*sh.k)
		b.Run(sh.name+"/columns", func(b *testing.B) {
			for b.Loop() {
				g.SgemmPanels(sh.m, sh.n, sh.k, w, sh.k, panels, c, sh.n)
			}
			b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
		ap := make([]float32, g.RowPanelsLen(sh.n, sh.k))
		bp := make([]float32, (sh.m+nr-1)/nr*nr*sh.k)
		g.PackColumnPanels(bp, w, sh.m, sh.k, sh.k)
		ct := make([]float32, sh.n*sh.m)
		b.Run(sh.name+"/rows", func(b *testing.B) {
			for b.Loop() {
				g.SgemmRowPanels(sh.n, sh.m, sh.k, ap, bp, ct, sh.m)
			}
			b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
	}
}

// TestSgemmUnpacked checks the unpacked-B product against SgemmPanels over
// the same B packed (the same tiles and k slices, so the same bits), for
// shapes around the 12-row tile, its 8- and 4-row edge tiles, partial
// 32-column panels, k beyond one kc slice, and padded row strides; and
// that C's padding is not written.
func TestSgemmUnpacked(t *testing.T) {
	g, err := kernel.New(kernel.Options{ISA: kernel.ISAAVX512, Threads: 1})
	if err != nil {
		t.Skip("no AVX-512 path:", err)
	}
	r := rand.New(rand.NewPCG(61, 62))
	_, nr := g.Tile()
	for _, m := range []int{1, 3, 4, 7, 8, 12, 16, 20, 64, 147} {
		for _, n := range []int{1, 31, 32, 33, 96, 100} {
			for _, k := range []int{1, 16, 300, 600} {
				a := make([]float32, m*(k+3))
				b := make([]float32, k*(n+5))
				for i := range a {
					a[i] = r.Float32()*2 - 1
				}
				for i := range b {
					b[i] = r.Float32()*2 - 1
				}
				lda, ldb, ldc := k+3, n+5, n+2
				c := make([]float32, m*ldc)
				for i := range c {
					c[i] = -7
				}
				if !g.SgemmUnpacked(m, n, k, a, lda, b, ldb, c, ldc) {
					t.Fatal("SgemmUnpacked reports no unpacked-B kernel on the AVX-512 path")
				}
				// B packed as 32-wide panels: panel q row p holds
				// b[p][q·nr : q·nr+nr], zero past n.
				np := (n + nr - 1) / nr
				panels := make([]float32, np*k*nr)
				for q := 0; q < np; q++ {
					for p := 0; p < k; p++ {
						for j := 0; j < nr && q*nr+j < n; j++ {
							panels[q*k*nr+p*nr+j] = b[p*ldb+q*nr+j]
						}
					}
				}
				want := make([]float32, m*ldc)
				for i := range want {
					want[i] = -7
				}
				g.SgemmPanels(m, n, k, a, lda, panels, want, ldc)
				for i := range c {
					if math.Float32bits(c[i]) != math.Float32bits(want[i]) {
						t.Fatalf("m=%d n=%d k=%d: C[%d] = %v, SgemmPanels %v", m, n, k, i, c[i], want[i])
					}
				}
			}
		}
	}
}
