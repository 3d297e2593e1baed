package engine

import (
	"context"
	"errors"
	"fmt"
	"slices"

	"heedmap/kernel"
	"heedmap/tensor"
)

// Backward computes, in one reverse sweep, the vector-Jacobian product of
// the scalar Σ_o Σ seed_o ⊙ o (o ranging over the seeded values) with
// respect to every name in wrt: graph inputs or intermediate values. Seeds
// may name graph outputs or any value computed in the pass; each must have
// that value's shape.
//
// Only nodes that both lie downstream of some wrt value and upstream of
// some seed are visited. Where a value feeds several nodes its gradients
// are summed. A wrt value the seeds do not depend on gets a zero gradient.
// The pass must have been run with RunOptions.Backward. Backward does not
// modify the pass, so it may be called repeatedly with different seeds.
func (p *Pass) Backward(ctx context.Context, seeds map[string]*tensor.Tensor, wrt []string) (map[string]*tensor.Tensor, error) {
	g := p.g
	if !p.backward {
		return nil, errors.New("engine: Backward on a pass run without RunOptions.Backward")
	}
	if p.released {
		return nil, errors.New("engine: Backward on a released pass")
	}
	if len(seeds) == 0 {
		return nil, errors.New("engine: Backward needs at least one seed")
	}
	if p.parts != nil {
		return p.splitBackward(ctx, seeds, wrt)
	}
	// upstream[v]: some wrt value is v or an ancestor of v.
	upstream := make([]bool, len(g.names))
	isWrt := make([]bool, len(g.names))
	for _, name := range wrt {
		v, ok := g.index[name]
		if !ok {
			return nil, fmt.Errorf("engine: Backward: graph has no value %q", name)
		}
		if p.shapes[v] == nil {
			return nil, fmt.Errorf("engine: Backward: value %q was not computed in this pass", name)
		}
		if p.dtypes[v] != tensor.Float32 {
			return nil, fmt.Errorf("engine: Backward: value %q is %s, not differentiable", name, p.dtypes[v])
		}
		upstream[v], isWrt[v] = true, true
	}
	first := len(g.nodes)
	for k, nd := range g.nodes {
		for _, v := range nd.in {
			if v >= 0 && upstream[v] {
				for _, o := range nd.out {
					if o >= 0 {
						upstream[o] = true
					}
				}
				if k < first {
					first = k
				}
				break
			}
		}
	}

	grads := make([]*tensor.Tensor, len(g.names))
	// owned[v]: grads[v]'s buffer belongs to the sweep: drawn from the
	// arena, returned afresh by an op (freshGrads), or a view an op made of
	// an owned output gradient (Add, Identity, Reshape and Flatten pass
	// theirs on without copying). Several values may share one owned
	// buffer; it is written in place only while no other live gradient
	// holds it (copy on write) and goes back to the arena when its last
	// holder dies (see release). Seeds are never owned, so never written
	// or recycled.
	owned := make([]bool, len(g.names))
	// pending holds the current node's input gradients not yet stored in
	// grads, so a buffer two of them share is neither released nor
	// written in place while the other still needs it.
	var pending []*tensor.Tensor
	// shared reports whether a live gradient other than grads[except], or
	// a pending one other than skip, uses buf's backing array.
	shared := func(buf []float32, except int, skip *tensor.Tensor) bool {
		if cap(buf) == 0 {
			return false
		}
		end := backing(buf)
		for u, o := range grads {
			if u != except && o != nil && backing(o.F32) == end {
				return true
			}
		}
		for _, o := range pending {
			if o != nil && o != skip && backing(o.F32) == end {
				return true
			}
		}
		return false
	}
	// release hands t, an owned gradient that grads[except] (if any) no
	// longer holds, to the arena unless another gradient shares its
	// backing array. The gradients handed to the caller never die here.
	release := func(t *tensor.Tensor, except int) {
		if g.arena == nil || t == nil || cap(t.F32) == 0 || shared(t.F32, except, t) {
			return
		}
		g.arena.put(t.F32)
	}
	for name, s := range seeds {
		v, ok := g.index[name]
		if !ok {
			return nil, fmt.Errorf("engine: Backward: seed for unknown value %q", name)
		}
		if p.shapes[v] == nil {
			return nil, fmt.Errorf("engine: Backward: seed for %q, which was not computed in this pass", name)
		}
		if s == nil || s.DType != tensor.Float32 || !shapeEq(s.Shape, p.shapes[v]) || len(s.F32) != tensor.Numel(s.Shape) {
			return nil, fmt.Errorf("engine: Backward: seed for %q must be float32 %v, got %v", name, p.shapes[v], s)
		}
		grads[v] = s
	}

	var gradOut, in, out []*tensor.Tensor
	var need []bool
	for k := len(g.nodes) - 1; k >= first; k-- {
		nd := g.nodes[k]
		gradOut = gradOut[:0]
		any := false
		for _, v := range nd.out {
			var gv *tensor.Tensor
			if v >= 0 {
				gv = grads[v]
			}
			gradOut = append(gradOut, gv)
			any = any || gv != nil
		}
		if !any {
			continue
		}
		reaches := false
		for _, v := range nd.in {
			if v >= 0 && upstream[v] {
				reaches = true
				break
			}
		}
		if !reaches {
			continue
		}
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		d, ok := nd.op.(Differentiable)
		if !ok {
			return nil, fmt.Errorf("engine: Backward: %s has no gradient", nd.label())
		}
		in = in[:0]
		for i, v := range nd.in {
			if v < 0 {
				in = append(in, nil)
				continue
			}
			if nd.needIn[i] {
				if p.vals[v] == nil {
					return nil, fmt.Errorf("engine: Backward: %s input %q was freed", nd.label(), g.names[v])
				}
				in = append(in, p.vals[v])
			} else {
				in = append(in, &tensor.Tensor{DType: p.dtypes[v], Shape: p.shapes[v]})
			}
		}
		out = out[:0]
		for i, v := range nd.out {
			switch {
			case v < 0:
				out = append(out, nil)
			case nd.needOut[i] && p.vals[v] != nil:
				out = append(out, p.vals[v])
			case nd.needOut[i] && p.bits != nil && p.bits[v] != nil:
				// Kept as mask bits: bitGrad below reads those.
				out = append(out, &tensor.Tensor{DType: p.dtypes[v], Shape: p.shapes[v]})
			case nd.needOut[i]:
				return nil, fmt.Errorf("engine: Backward: %s output %q was freed", nd.label(), g.names[v])
			default:
				out = append(out, &tensor.Tensor{DType: p.dtypes[v], Shape: p.shapes[v]})
			}
		}
		need = need[:0]
		for _, v := range nd.in {
			need = append(need, v >= 0 && upstream[v])
		}
		var gin []*tensor.Tensor
		var err error
		// The output gradient dies at this node and nothing else holds it:
		// an elementwise op may overwrite it with its input's.
		o := nd.out
		dies := len(o) == 1 && o[0] >= 0 && !isWrt[o[0]] && owned[o[0]] && !shared(grads[o[0]].F32, o[0], nil)
		if len(o) == 1 && o[0] >= 0 && p.bits != nil && p.bits[o[0]] != nil && need[0] {
			gy := grads[o[0]]
			gx := gy
			if !dies || !onlyFirst(need) {
				gx = g.arena.tensor(gy.Shape...) // every element written
			}
			p.bitGrad(gx.F32, gy.F32, o[0])
			gin = make([]*tensor.Tensor, len(nd.in))
			gin[0] = gx
		}
		if dies && gin == nil {
			if ip, ok := nd.op.(gradInPlace); ok && onlyFirst(need) {
				gin, err = safeInPlace(ip, in, out, grads[o[0]])
				if err != nil {
					return nil, fmt.Errorf("engine: Backward: %s: %w", nd.label(), err)
				}
			}
		}
		if mb, ok := nd.op.(memoBackward); ok && gin == nil && g.arena != nil {
			gin, err = safeMemo(mb, in, out, gradOut, need, func(i, n int, build func([]float32)) []float32 {
				if i >= len(nd.in) || nd.in[i] < 0 || g.consts[nd.in[i]] == nil {
					return nil
				}
				return g.arena.derived(g.consts[nd.in[i]], nd.op, n, build)
			})
			if err != nil {
				return nil, fmt.Errorf("engine: Backward: %s: %w", nd.label(), err)
			}
		}
		if gin == nil {
			gin, err = safeBackward(nd.op, d, in, out, gradOut, need)
			if err != nil {
				return nil, fmt.Errorf("engine: Backward: %s: %w", nd.label(), err)
			}
		}
		fresh := freshGrads(nd.op)
		pending = append(pending[:0], gin...)
		for i, v := range nd.in {
			if i >= len(gin) {
				break
			}
			gi := gin[i]
			pending[i] = nil
			if v < 0 || gi == nil || !upstream[v] {
				continue
			}
			if !shapeEq(gi.Shape, p.shapes[v]) || len(gi.F32) != tensor.Numel(p.shapes[v]) {
				return nil, fmt.Errorf("engine: Backward: %s returned gradient %v for input %q of shape %v", nd.label(), gi, g.names[v], p.shapes[v])
			}
			// A view of an output gradient is owned as that gradient is;
			// anything else is owned when the op allocates afresh.
			giOwned := fresh
			if cap(gi.F32) > 0 {
				for j, gv := range gradOut {
					if gv != nil && backing(gv.F32) == backing(gi.F32) {
						giOwned = owned[nd.out[j]]
						break
					}
				}
			}
			cur := grads[v]
			switch {
			case cur == nil:
				grads[v], owned[v] = gi, giOwned
			case owned[v] && !shared(cur.F32, v, nil):
				addTo(g.team, cur.F32, gi.F32)
				if giOwned {
					release(gi, -1)
				}
			case giOwned && !shared(gi.F32, -1, gi):
				// Addition commutes exactly, so summing into gi gives the
				// bits summing into a copy of cur would.
				addTo(g.team, gi.F32, cur.F32)
				grads[v] = gi
				if owned[v] {
					release(cur, -1)
				}
				owned[v] = true
			default:
				c := g.arena.tensor(p.shapes[v]...)
				copy(c.F32, cur.F32)
				addTo(g.team, c.F32, gi.F32)
				grads[v] = c
				if owned[v] {
					release(cur, -1)
				}
				owned[v] = true
				if giOwned {
					release(gi, -1)
				}
			}
		}
		pending = pending[:0]
		// Output gradients are no longer needed unless asked for.
		for _, v := range nd.out {
			if v >= 0 && !isWrt[v] {
				t := grads[v]
				grads[v] = nil
				if owned[v] {
					release(t, -1)
				}
				owned[v] = false
			}
		}
	}

	res := make(map[string]*tensor.Tensor, len(wrt))
	handed := map[uintptr]bool{}
	for _, name := range wrt {
		v := g.index[name]
		gv := grads[v]
		switch {
		case gv == nil:
			gv = tensor.New(p.shapes[v]...)
		case !owned[v] || handed[backing(gv.F32)]:
			// Never hand back a seed, a tensor an op may share, or one
			// buffer as two results.
			gv = gv.Clone()
		}
		if cap(gv.F32) > 0 {
			handed[backing(gv.F32)] = true
		}
		res[name] = gv
	}
	return res, nil
}

// shapeEq reports whether a and b are equal shapes.
func shapeEq(a, b []int) bool { return slices.Equal(a, b) }

// safeBackward calls the op's selective backward when it has one, turning
// a panic into an error like safeForward.
func safeBackward(op Op, d Differentiable, in, out, gradOut []*tensor.Tensor, need []bool) (gin []*tensor.Tensor, err error) {
	defer func() {
		if r := recover(); r != nil {
			gin, err = nil, fmt.Errorf("operator backward panicked: %v", r)
		}
	}()
	if sb, ok := op.(SelectiveBackward); ok {
		return sb.BackwardFor(in, out, gradOut, need)
	}
	return d.Backward(in, out, gradOut)
}

// floatBackward starts the Backward of an op whose first input carries
// the gradient: it returns the (still empty) input gradients and the
// output gradient, or a nil output gradient when there is nothing to
// propagate (no gradient arrived, or the input is not float32).
func floatBackward(in, gradOut []*tensor.Tensor) ([]*tensor.Tensor, *tensor.Tensor) {
	grads := make([]*tensor.Tensor, len(in))
	g := gradOut[0]
	if g == nil || in[0].DType != tensor.Float32 {
		return grads, nil
	}
	return grads, g
}

// gradInPlace is implemented by elementwise operators whose input gradient
// has the output gradient's shape and can be computed in place over it
// (ReLU, Clip: dX = dY masked where the unit is active). Pass.Backward
// calls backwardInPlace instead of Backward when the output gradient is
// the sweep's own and dies at this node, which saves a buffer and a full
// pass of zeroing. The op returns the gradients as Backward would, with
// g itself as the first input's, or nil gradients when it declines (the
// caller then runs Backward), and must leave g untouched when it declines.
type gradInPlace interface {
	backwardInPlace(in, out []*tensor.Tensor, g *tensor.Tensor) ([]*tensor.Tensor, error)
}

// safeInPlace is safeBackward for gradInPlace.
func safeInPlace(ip gradInPlace, in, out []*tensor.Tensor, g *tensor.Tensor) (gin []*tensor.Tensor, err error) {
	defer func() {
		if r := recover(); r != nil {
			gin, err = nil, fmt.Errorf("operator backward panicked: %v", r)
		}
	}()
	return ip.backwardInPlace(in, out, g)
}

// onlyFirst reports whether need asks for the first input's gradient and
// no other.
func onlyFirst(need []bool) bool {
	if len(need) == 0 || !need[0] {
		return false
	}
	for _, n := range need[1:] {
		if n {
			return false
		}
	}
	return true
}

// addTo adds src into dst elementwise (dst[i] += src[i]) with the vector
// kernel, long slices split over the graph's team (a fresh goroutine per
// chunk cost more than the sums at batch 1).
func addTo(tm *team, dst, src []float32) {
	n := len(src)
	tm.split(n, n, func(i0, i1 int) { kernel.AddTo(dst[i0:i1], src[i0:i1]) })
}

// memoFunc returns data derived from the op's input i by build (which
// fills a slice of n floats) and kept for every later pass, or nil when
// input i is not a constant of the graph (the op then derives it itself).
// The result is shared: read only.
type memoFunc func(i, n int, build func([]float32)) []float32

// memoBackward is implemented by ops whose Backward derives something
// from a constant input that later passes can reuse (Conv's flipped
// filters). Pass.Backward calls backwardMemo, with the graph's memo,
// instead of the selective Backward.
type memoBackward interface {
	backwardMemo(in, out, gradOut []*tensor.Tensor, need []bool, memo memoFunc) ([]*tensor.Tensor, error)
}

// safeMemo is safeBackward for memoBackward.
func safeMemo(mb memoBackward, in, out, gradOut []*tensor.Tensor, need []bool, memo memoFunc) (gin []*tensor.Tensor, err error) {
	defer func() {
		if r := recover(); r != nil {
			gin, err = nil, fmt.Errorf("operator backward panicked: %v", r)
		}
	}()
	return mb.backwardMemo(in, out, gradOut, need, memo)
}
