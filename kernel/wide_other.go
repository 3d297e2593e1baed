//go:build !amd64

package kernel

// wideKernels: no tap-offset kernels off amd64; SgemmWide packs B panels.
func wideKernels(*config) (wideTaps, func(int) wideTaps, bool) { return nil, nil, false }
