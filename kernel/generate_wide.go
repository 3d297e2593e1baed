package kernel

//go:generate go -C asmgen run . -set wide -out ../wide_amd64.s -stubs ../wide_stubs_amd64.go -pkg kernel
