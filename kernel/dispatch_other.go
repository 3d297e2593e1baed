//go:build !amd64

package kernel

// archKernels: only the pure-Go path exists off amd64.
func archKernels() map[ISA]config { return nil }
