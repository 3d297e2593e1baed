package engine

// ReduceMax, ReduceMin, ReduceProd, ReduceL1, ReduceL2, ReduceSumSquare,
// ReduceLogSum, ReduceLogSumExp, ArgMax and ArgMin.
//
// These accumulate in float64 per output element (one pass; LogSumExp
// takes two, subtracting the maximum first so exp cannot overflow) and
// round once. Backward recomputes the per-element derivative from x and
// the forward output: Max/Min route the gradient to the first element
// attaining the extreme, Prod uses the product of the other elements
// (exact when x contains zeros), the norms use their closed forms.

import (
	"fmt"
	"math"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	for k := redMax; k <= redLogSumExp; k++ {
		register(redNames[k], buildReduce(k))
	}
	register("ArgMax", buildArg(true))
	register("ArgMin", buildArg(false))
}

// forwardOther computes every reduction but Sum and Mean.
func (r *reduceOp) forwardOther(x *tensor.Tensor, kept, out []int) ([]*tensor.Tensor, error) {
	p, err := newBcastPlan(x.Shape, kept)
	if err != nil {
		return nil, err
	}
	n := tensor.Numel(kept)
	if x.DType != tensor.Float32 {
		if r.kind != redMax && r.kind != redMin && r.kind != redProd && r.kind != redSumSquare && r.kind != redL1 {
			return nil, fmt.Errorf("%s: integer input not supported", r.name())
		}
		acc := make([]int64, n)
		init := make([]bool, n)
		p.rows(func(o int, offs, steps []int, m int) {
			for i := 0; i < m; i++ {
				k, v := offs[0]+i*steps[0], x.I64[o+i]
				switch r.kind {
				case redMax:
					if !init[k] || v > acc[k] {
						acc[k] = v
					}
				case redMin:
					if !init[k] || v < acc[k] {
						acc[k] = v
					}
				case redProd:
					if !init[k] {
						acc[k] = 1
					}
					acc[k] *= v
				case redSumSquare:
					acc[k] += v * v
				case redL1:
					acc[k] += max(v, -v)
				}
				init[k] = true
			}
		})
		if r.kind == redProd {
			for k := range acc {
				if !init[k] {
					acc[k] = 1
				}
			}
		}
		return []*tensor.Tensor{{DType: x.DType, Shape: out, I64: acc}}, nil
	}
	acc := make([]float64, n)
	switch r.kind {
	case redMax, redLogSumExp:
		for k := range acc {
			acc[k] = math.Inf(-1)
		}
	case redMin:
		for k := range acc {
			acc[k] = math.Inf(1)
		}
	case redProd:
		for k := range acc {
			acc[k] = 1
		}
	}
	p.rows(func(o int, offs, steps []int, m int) {
		for i := 0; i < m; i++ {
			k, v := offs[0]+i*steps[0], float64(x.F32[o+i])
			switch r.kind {
			case redMax, redLogSumExp:
				if v > acc[k] || v != v {
					acc[k] = v
				}
			case redMin:
				if v < acc[k] || v != v {
					acc[k] = v
				}
			case redProd:
				acc[k] *= v
			case redL1:
				acc[k] += math.Abs(v)
			case redL2, redSumSquare:
				acc[k] += v * v
			case redLogSum:
				acc[k] += v
			}
		}
	})
	if r.kind == redLogSumExp {
		m := append([]float64(nil), acc...)
		for k := range acc {
			acc[k] = 0
		}
		p.rows(func(o int, offs, steps []int, cnt int) {
			for i := 0; i < cnt; i++ {
				k := offs[0] + i*steps[0]
				if !math.IsInf(m[k], 0) {
					acc[k] += math.Exp(float64(x.F32[o+i]) - m[k])
				}
			}
		})
		for k := range acc {
			if math.IsInf(m[k], 0) {
				acc[k] = m[k]
			} else {
				acc[k] = m[k] + math.Log(acc[k])
			}
		}
	}
	y := tensor.New(out...)
	for k, v := range acc {
		switch r.kind {
		case redL2:
			v = math.Sqrt(v)
		case redLogSum:
			v = math.Log(v)
		}
		y.F32[k] = float32(v)
	}
	return []*tensor.Tensor{y}, nil
}

// backwardOther is the gradient of forwardOther (float inputs only).
func (r *reduceOp) backwardOther(x, y, g *tensor.Tensor, kept []int) (*tensor.Tensor, error) {
	p, err := newBcastPlan(x.Shape, kept)
	if err != nil {
		return nil, err
	}
	gx := tensor.New(x.Shape...)
	switch r.kind {
	case redMax, redMin:
		taken := make([]bool, len(y.F32))
		p.rows(func(o int, offs, steps []int, m int) {
			for i := 0; i < m; i++ {
				k := offs[0] + i*steps[0]
				if !taken[k] && x.F32[o+i] == y.F32[k] {
					taken[k] = true
					gx.F32[o+i] = g.F32[k]
				}
			}
		})
	case redProd:
		// Product of the other elements: y/x unless x is zero; with zeros,
		// only a lone zero gets a gradient (the product of the rest).
		zeros := make([]int, len(y.F32))
		nz := make([]float64, len(y.F32))
		for k := range nz {
			nz[k] = 1
		}
		p.rows(func(o int, offs, steps []int, m int) {
			for i := 0; i < m; i++ {
				k, v := offs[0]+i*steps[0], float64(x.F32[o+i])
				if v == 0 {
					zeros[k]++
				} else {
					nz[k] *= v
				}
			}
		})
		p.rows(func(o int, offs, steps []int, m int) {
			for i := 0; i < m; i++ {
				k, v := offs[0]+i*steps[0], float64(x.F32[o+i])
				var d float64
				switch {
				case zeros[k] == 0:
					d = nz[k] / v
				case zeros[k] == 1 && v == 0:
					d = nz[k]
				}
				gx.F32[o+i] = float32(float64(g.F32[k]) * d)
			}
		})
	default:
		p.rows(func(o int, offs, steps []int, m int) {
			for i := 0; i < m; i++ {
				k, v := offs[0]+i*steps[0], float64(x.F32[o+i])
				yv := float64(y.F32[k])
				var d float64
				switch r.kind {
				case redL1:
					d = float64(signF32(float32(v)))
				case redL2:
					if yv != 0 {
						d = v / yv
					}
				case redSumSquare:
					d = 2 * v
				case redLogSum:
					d = 1 / math.Exp(yv)
				case redLogSumExp:
					d = math.Exp(v - yv)
				}
				gx.F32[o+i] = float32(float64(g.F32[k]) * d)
			}
		})
	}
	return gx, nil
}

// ---------------------------------------------------------------------------
// ArgMax, ArgMin

type argOp struct {
	max      bool
	axis     int64
	keepdims bool
	last     bool
}

func buildArg(isMax bool) Builder {
	return func(n *onnx.Node, env *Env) (Op, error) {
		return &argOp{max: isMax, axis: n.Int("axis", 0), keepdims: n.Int("keepdims", 1) != 0,
			last: n.Int("select_last_index", 0) != 0}, nil
	}
}

func (a *argOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	name := "ArgMin"
	if a.max {
		name = "ArgMax"
	}
	if err := shNeed(in, 1, name); err != nil {
		return nil, err
	}
	x := in[0]
	axis, err := shAxis(a.axis, len(x.Shape))
	if err != nil {
		return nil, fmt.Errorf("%s: %v", name, err)
	}
	outer, dim, inner := tensor.Numel(x.Shape[:axis]), x.Shape[axis], tensor.Numel(x.Shape[axis+1:])
	if dim == 0 {
		return nil, fmt.Errorf("%s: empty axis", name)
	}
	var shape []int
	for d, v := range x.Shape {
		if d == axis {
			if a.keepdims {
				shape = append(shape, 1)
			}
		} else {
			shape = append(shape, v)
		}
	}
	if shape == nil {
		shape = []int{}
	}
	y := tensor.NewInt64(shape...)
	val := func(i int) float64 {
		if x.DType == tensor.Float32 {
			return float64(x.F32[i])
		}
		return float64(x.I64[i])
	}
	for o := 0; o < outer; o++ {
		for in := 0; in < inner; in++ {
			best, arg := val(o*dim*inner+in), 0
			for j := 1; j < dim; j++ {
				v := val((o*dim+j)*inner + in)
				better := v > best
				if !a.max {
					better = v < best
				}
				if better || (a.last && v == best) {
					best, arg = v, j
				}
			}
			y.I64[o*inner+in] = int64(arg)
		}
	}
	return []*tensor.Tensor{y}, nil
}
