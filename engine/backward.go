package engine

import (
	"context"
	"errors"
	"fmt"
	"slices"

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
	if len(seeds) == 0 {
		return nil, errors.New("engine: Backward needs at least one seed")
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
	// owned[v]: grads[v] is ours to add into: a clone, or a gradient an op
	// known to allocate afresh returned (freshGrads). Owned gradients that
	// die inside the sweep go back to the arena (see release).
	owned := make([]bool, len(g.names))
	// release hands t, an owned gradient nothing will read again, to the
	// arena unless another live gradient shares its backing array (a view
	// some op such as Reshape returned). Seeds are never owned, and the
	// gradients handed to the caller never die here.
	release := func(t *tensor.Tensor) {
		if g.arena == nil || t == nil || cap(t.F32) == 0 {
			return
		}
		end := backing(t.F32)
		for _, o := range grads {
			if o != nil && o != t && backing(o.F32) == end {
				return
			}
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

	for k := len(g.nodes) - 1; k >= first; k-- {
		nd := g.nodes[k]
		var gradOut []*tensor.Tensor
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
		in := make([]*tensor.Tensor, len(nd.in))
		for i, v := range nd.in {
			if v < 0 {
				continue
			}
			if nd.needIn[i] {
				if p.vals[v] == nil {
					return nil, fmt.Errorf("engine: Backward: %s input %q was freed", nd.label(), g.names[v])
				}
				in[i] = p.vals[v]
			} else {
				in[i] = &tensor.Tensor{DType: p.dtypes[v], Shape: p.shapes[v]}
			}
		}
		out := make([]*tensor.Tensor, len(nd.out))
		for i, v := range nd.out {
			if v < 0 {
				continue
			}
			if nd.needOut[i] && p.vals[v] != nil {
				out[i] = p.vals[v]
			} else if nd.needOut[i] {
				return nil, fmt.Errorf("engine: Backward: %s output %q was freed", nd.label(), g.names[v])
			} else {
				out[i] = &tensor.Tensor{DType: p.dtypes[v], Shape: p.shapes[v]}
			}
		}
		need := make([]bool, len(nd.in))
		for i, v := range nd.in {
			need[i] = v >= 0 && upstream[v]
		}
		gin, err := safeBackward(nd.op, d, in, out, gradOut, need)
		if err != nil {
			return nil, fmt.Errorf("engine: Backward: %s: %w", nd.label(), err)
		}
		fresh := freshGrads(nd.op)
		for i, v := range nd.in {
			if v < 0 || i >= len(gin) || gin[i] == nil || !upstream[v] {
				continue
			}
			gi := gin[i]
			if !shapeEq(gi.Shape, p.shapes[v]) || len(gi.F32) != tensor.Numel(p.shapes[v]) {
				return nil, fmt.Errorf("engine: Backward: %s returned gradient %v for input %q of shape %v", nd.label(), gi, g.names[v], p.shapes[v])
			}
			if grads[v] == nil {
				// A fresh gradient has no other holder until v's producer
				// runs, after every addition into it.
				grads[v], owned[v] = gi, fresh
				continue
			}
			if !owned[v] {
				c := g.arena.tensor(p.shapes[v]...)
				copy(c.F32, grads[v].F32)
				grads[v], owned[v] = c, true
			}
			acc := grads[v].F32
			for j, x := range gi.F32 {
				acc[j] += x
			}
			if fresh {
				release(gi)
			}
		}
		// Output gradients are no longer needed unless asked for.
		for _, v := range nd.out {
			if v >= 0 && !isWrt[v] {
				t := grads[v]
				grads[v] = nil
				if owned[v] {
					release(t)
				}
				owned[v] = false
			}
		}
	}

	res := make(map[string]*tensor.Tensor, len(wrt))
	for _, name := range wrt {
		v := g.index[name]
		gv := grads[v]
		switch {
		case gv == nil:
			gv = tensor.New(p.shapes[v]...)
		case !owned[v]:
			// Never hand back a seed or a tensor an op may share.
			gv = gv.Clone()
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
