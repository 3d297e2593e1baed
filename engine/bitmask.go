package engine

import (
	"unsafe"

	"heedmap/kernel"
	"heedmap/tensor"
)

// Activation masks kept as bits.
//
// ReLU's and Clip's gradients read only which outputs lie strictly inside
// the bounds (reluMask, clipMask). When Backward reads such an output for
// nothing else, a pass run with RunOptions.Backward keeps that test as one
// bit per value (kernel.RangeBits, computed right after the node while its
// output is in cache) instead of the float32 tensor, and the tensor goes
// back to the arena after its last forward reader like any other value.
// In MobileNetV2 these outputs are nearly all a pass keeps (24 MB per
// 224² image, now 0.75 MB): at batch 16, run image by image (split.go),
// each image's kept tensors went to memory and back before its backward
// ran. The gradient is the same bit for bit: the bits are the test
// MaskRange applies (TestRangeBits).

// planBitMasks marks the values that may be kept as bits: the output of a
// ReLU or Clip node that no node's Backward reads as an input. Whether a
// Clip's bounds allow it is known only in a pass (maskTest).
func planBitMasks(g *Graph) {
	g.bitMask = make([]bool, len(g.names))
	for _, nd := range g.nodes {
		if !isMaskOp(nd.op) || len(nd.out) != 1 || nd.out[0] < 0 {
			continue
		}
		g.bitMask[nd.out[0]] = true
	}
	for _, nd := range g.nodes {
		for i, v := range nd.in {
			if v >= 0 && nd.needIn[i] {
				g.bitMask[v] = false
			}
		}
	}
}

func isMaskOp(op Op) bool {
	switch o := op.(type) {
	case *unaryOp:
		return o.name == "Relu"
	case *clipOp:
		return true
	}
	return false
}

// maskTest returns the unsigned range test (kernel.MaskRange's lo and
// span) of node nd's gradient mask in pass p, and false when its bounds
// have no such test (a negative Clip bound), or the output is not float32.
func (p *Pass) maskTest(nd *node) (lo, span uint32, ok bool) {
	if p.dtypes[nd.out[0]] != tensor.Float32 {
		return 0, 0, false
	}
	c, isClip := nd.op.(*clipOp)
	if !isClip {
		return reluLo, reluSpan, true
	}
	in := make([]*tensor.Tensor, len(nd.in))
	for i, v := range nd.in {
		if v >= 0 {
			in[i] = p.vals[v]
		}
	}
	l, h, err := c.bounds(in)
	if err != nil {
		return 0, 0, false
	}
	return clipRange(l, h)
}

// keepBits replaces value v, the output of node nd, by its mask bits if
// nd's bounds allow; it reports whether it did. The bits live in an arena
// buffer (two float32 a word), so passes reuse them like activations.
func (p *Pass) keepBits(v int, nd *node) bool {
	lo, span, ok := p.maskTest(nd)
	if !ok {
		return false
	}
	y := p.vals[v].F32
	words := (len(y) + 63) / 64
	buf := p.g.arena.floats(2 * words)
	bits := wordsOf(buf)
	p.g.team.split(words, len(y), func(w0, w1 int) {
		kernel.RangeBits(bits[w0:w1], y[w0*64:min(w1*64, len(y))], lo, span)
	})
	if p.bits == nil {
		p.bits = make([][]float32, len(p.g.names))
	}
	p.bits[v] = buf
	p.liveBytes += 4 * int64(len(buf)) // held until Release, like kept values
	return true
}

// wordsOf views an arena buffer of 2·k float32 as k mask words. Go
// allocates slices of 8 bytes and more at 8-byte alignment.
func wordsOf(buf []float32) []uint64 {
	if len(buf) < 2 {
		return nil
	}
	return unsafe.Slice((*uint64)(unsafe.Pointer(&buf[0])), len(buf)/2)
}

// bitGrad is the Backward of a ReLU or Clip node whose output p keeps as
// bits: dst = g where the bit is set, +0 elsewhere, written into dst
// (which may be g).
func (p *Pass) bitGrad(dst, g []float32, v int) {
	bits := wordsOf(p.bits[v])
	n := len(g)
	p.g.team.split((n+63)/64, n, func(w0, w1 int) {
		i0, i1 := w0*64, min(w1*64, n)
		kernel.MaskBits(dst[i0:i1], g[i0:i1], bits[w0:w1])
	})
}

// releaseBits hands the pass's mask bits back to the arena.
func (p *Pass) releaseBits() {
	for v, b := range p.bits {
		if b != nil {
			p.g.arena.put(b)
			p.bits[v] = nil
		}
	}
}
