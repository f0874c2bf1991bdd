package losses

import (
	"fmt"
	"hash"
	"math"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// The per-column log-likelihood runs as one gorgonia op over the whole
// record (forward) and two ops for its gradients (with respect to the
// decoder output and to the log sigmas): a record of mixed columns would
// otherwise need a slice and a chain of elementwise ops per column.
// Computation is in float64 whatever the dtype.

type columnsOp struct {
	cols  []Column
	offs  []int
	width int
}

func (op *columnsOp) hashString() string { return fmt.Sprintf("%v", op.cols) }

// colTerms computes the terms of one record, see columnTerms.
func (op *columnsOp) colTerms(x, out, ls, lp, dOut, dLs []float64) {
	columnTerms(op.cols, op.offs, x, out, ls, lp, dOut, dLs)
}

// columnTerms computes, for one record of the columns cols (whose outputs
// start at offs), the log-probability of each column and (when dOut, dLs
// are non-nil) the derivatives of each column's term with respect to its
// outputs (written into dOut at the column's offsets) and to its log sigma
// (dLs[j]). It is the one implementation of the per-column formulas: the
// graph op's forward pass and gradients and Columns.LogProbRow (the lean
// inference path) call it. It allocates nothing.
func columnTerms(cols []Column, offs []int, x, out, ls, lp, dOut, dLs []float64) {
	for j, c := range cols {
		xv := x[j]
		o := offs[j]
		if dLs != nil {
			dLs[j] = 0
		}
		if dOut != nil {
			for k := 0; k < c.outputs(); k++ {
				dOut[o+k] = 0
			}
		}
		if math.IsNaN(xv) { // missing
			lp[j] = 0
			continue
		}
		switch c.Kind {
		case ColumnReal, ColumnPositive:
			y, extra := xv, 0.0
			if c.Kind == ColumnPositive {
				if !(xv > 0) {
					lp[j] = math.Inf(-1)
					continue
				}
				y = math.Log(xv)
				extra = -y
			}
			logS := math.Log(c.sigma())
			if c.LearnSigma {
				logS = ls[j]
			}
			r := (y - out[o]) * math.Exp(-logS)
			lp[j] = -0.5*r*r - logS - 0.5*log2Pi + extra
			if dOut != nil {
				dOut[o] = r * math.Exp(-logS)
				if c.LearnSigma {
					dLs[j] = r*r - 1
				}
			}
		case ColumnCount:
			if !(xv >= 0) || xv != math.Floor(xv) || math.IsInf(xv, 0) {
				lp[j] = math.Inf(-1)
				continue
			}
			lg, _ := math.Lgamma(xv + 1)
			rate := math.Exp(out[o])
			lp[j] = xv*out[o] - rate - lg
			if dOut != nil {
				dOut[o] = xv - rate
			}
		case ColumnBinary:
			if xv != 0 && xv != 1 {
				lp[j] = math.Inf(-1)
				continue
			}
			l := out[o]
			lp[j] = xv*l - softplusF(l)
			if dOut != nil {
				dOut[o] = xv - 1/(1+math.Exp(-l))
			}
		case ColumnCategorical:
			k := int(xv)
			if float64(k) != xv || k < 0 || k >= c.Categories {
				lp[j] = math.Inf(-1)
				continue
			}
			lg := out[o : o+c.Categories]
			mx := math.Inf(-1)
			for _, l := range lg {
				mx = math.Max(mx, l)
			}
			s := 0.0
			for _, l := range lg {
				s += math.Exp(l - mx)
			}
			lse := mx + math.Log(s)
			lp[j] = lg[k] - lse
			if dOut != nil {
				for i, l := range lg {
					dOut[o+i] = -math.Exp(l - lse)
				}
				dOut[o+k]++
			}
		}
	}
}

// rows returns the row-major float64 copies of the inputs and their dtype.
func denseF64(name string, vals []G.Value, n int) ([][]float64, tensor.Dtype, error) {
	if len(vals) != n {
		return nil, tensor.Dtype{}, fmt.Errorf("losses: %s: want %d inputs, have %d", name, n, len(vals))
	}
	out := make([][]float64, n)
	var dt tensor.Dtype
	for i, v := range vals {
		d, ok := v.(*tensor.Dense)
		if !ok {
			return nil, dt, fmt.Errorf("losses: %s: input %d is a %T, want a dense tensor", name, i, v)
		}
		if d.IsView() {
			d = d.Materialize().(*tensor.Dense)
		}
		if i == 0 {
			dt = d.Dtype()
		} else if d.Dtype() != dt {
			return nil, dt, fmt.Errorf("losses: %s: input %d is %v, input 0 is %v", name, i, d.Dtype(), dt)
		}
		if out[i] = toFloat64(d.Data()); out[i] == nil {
			return nil, dt, fmt.Errorf("losses: %s: dtype %v is not float32 or float64", name, d.Dtype())
		}
	}
	return out, dt, nil
}

func newDense(dt tensor.Dtype, data []float64, shape ...int) *tensor.Dense {
	if dt == tensor.Float32 {
		f := make([]float32, len(data))
		for i, v := range data {
			f[i] = float32(v)
		}
		return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(f))
	}
	return tensor.New(tensor.WithShape(shape...), tensor.WithBacking(data))
}

func (op *columnsOp) Arity() int { return 3 }

func (op *columnsOp) Type() hm.Type {
	t := G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t, t)
}

func (op *columnsOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 3 {
		return nil, fmt.Errorf("losses: columns: want 3 inputs, have %d", len(in))
	}
	s, ok := in[0].(tensor.Shape)
	if !ok || s.Dims() != 2 {
		return nil, fmt.Errorf("losses: columns: x is not a matrix: %v", in[0])
	}
	return s.Clone(), nil
}

func (op *columnsOp) Do(vals ...G.Value) (G.Value, error) {
	in, dt, err := denseF64("columns", vals, 3)
	if err != nil {
		return nil, err
	}
	x, out, ls := in[0], in[1], in[2]
	nc := len(op.cols)
	n := len(x) / nc
	if len(out) != n*op.width || len(ls) != nc {
		return nil, fmt.Errorf("losses: columns: %d outputs and %d log sigmas for %d records of %d columns", len(out), len(ls), n, nc)
	}
	lp := make([]float64, n*nc)
	for i := 0; i < n; i++ {
		op.colTerms(x[i*nc:(i+1)*nc], out[i*op.width:(i+1)*op.width], ls, lp[i*nc:(i+1)*nc], nil, nil)
	}
	return newDense(dt, lp, n, nc), nil
}

func (op *columnsOp) DiffWRT(inputs int) []bool { return []bool{false, true, true} }

func (op *columnsOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 3 {
		return nil, fmt.Errorf("losses: columns: want 3 inputs, have %d", len(inputs))
	}
	gOut, err := G.ApplyOp(&columnsGradOp{op: op, wrt: 1}, inputs[0], inputs[1], inputs[2], grad)
	if err != nil {
		return nil, err
	}
	gLs, err := G.ApplyOp(&columnsGradOp{op: op, wrt: 2}, inputs[0], inputs[1], inputs[2], grad)
	if err != nil {
		return nil, err
	}
	return G.Nodes{nil, gOut, gLs}, nil
}

func (op *columnsOp) ReturnsPtr() bool     { return false }
func (op *columnsOp) CallsExtern() bool    { return false }
func (op *columnsOp) OverwritesInput() int { return -1 }
func (op *columnsOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "lowerbound.losses.columns%s", op.hashString())
}
func (op *columnsOp) Hashcode() uint32 { return opHash(op) }
func (op *columnsOp) String() string   { return "ColumnsLogProb" }

// columnsGradOp computes the gradient of sum(g .* columns(x, out, ls))
// with respect to out (wrt 1, shape of out) or ls (wrt 2, shape (1, C)).
type columnsGradOp struct {
	op  *columnsOp
	wrt int
}

func (g *columnsGradOp) Arity() int { return 4 }

func (g *columnsGradOp) Type() hm.Type {
	t := G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t, t, t)
}

func (g *columnsGradOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 4 {
		return nil, fmt.Errorf("losses: columns gradient: want 4 inputs, have %d", len(in))
	}
	s, ok := in[g.wrt].(tensor.Shape)
	if !ok {
		return nil, fmt.Errorf("losses: columns gradient: input %d has no shape", g.wrt)
	}
	return s.Clone(), nil
}

func (g *columnsGradOp) Do(vals ...G.Value) (G.Value, error) {
	in, dt, err := denseF64("columns gradient", vals, 4)
	if err != nil {
		return nil, err
	}
	x, out, ls, up := in[0], in[1], in[2], in[3]
	op := g.op
	nc := len(op.cols)
	n := len(x) / nc
	if len(out) != n*op.width || len(ls) != nc || len(up) != n*nc {
		return nil, fmt.Errorf("losses: columns gradient: sizes %d, %d, %d, %d do not fit %d records", len(x), len(out), len(ls), len(up), n)
	}
	lp := make([]float64, nc)
	dOut := make([]float64, n*op.width)
	dLs := make([]float64, nc)
	rowLs := make([]float64, nc)
	for i := 0; i < n; i++ {
		row := dOut[i*op.width : (i+1)*op.width]
		op.colTerms(x[i*nc:(i+1)*nc], out[i*op.width:(i+1)*op.width], ls, lp, row, rowLs)
		u := up[i*nc : (i+1)*nc]
		for j := range op.cols {
			for k := op.offs[j]; k < op.offs[j]+op.cols[j].outputs(); k++ {
				row[k] *= u[j]
			}
			dLs[j] += u[j] * rowLs[j]
		}
	}
	if g.wrt == 1 {
		return newDense(dt, dOut, n, op.width), nil
	}
	return newDense(dt, dLs, 1, nc), nil
}

func (g *columnsGradOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }
func (g *columnsGradOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("losses: columns gradient: no second derivative")
}
func (g *columnsGradOp) ReturnsPtr() bool     { return false }
func (g *columnsGradOp) CallsExtern() bool    { return false }
func (g *columnsGradOp) OverwritesInput() int { return -1 }
func (g *columnsGradOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "lowerbound.losses.columns_grad%d%s", g.wrt, g.op.hashString())
}
func (g *columnsGradOp) Hashcode() uint32 { return opHash(g) }
func (g *columnsGradOp) String() string   { return fmt.Sprintf("ColumnsLogProbGrad[%d]", g.wrt) }

// columnsMeanOp maps (out, ls) to the per-column mean (mode for a
// categorical column); no gradient.
type columnsMeanOp struct{ c *Columns }

func (m *columnsMeanOp) Arity() int { return 2 }
func (m *columnsMeanOp) Type() hm.Type {
	t := G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t)
}
func (m *columnsMeanOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 2 {
		return nil, fmt.Errorf("losses: columns mean: want 2 inputs, have %d", len(in))
	}
	s, ok := in[0].(tensor.Shape)
	if !ok || s.Dims() != 2 {
		return nil, fmt.Errorf("losses: columns mean: out is not a matrix: %v", in[0])
	}
	return tensor.Shape{s[0], len(m.c.cols)}, nil
}
func (m *columnsMeanOp) Do(vals ...G.Value) (G.Value, error) {
	in, dt, err := denseF64("columns mean", vals, 2)
	if err != nil {
		return nil, err
	}
	out, ls := in[0], in[1]
	c := m.c
	nc := len(c.cols)
	n := len(out) / c.width
	res := make([]float64, n*nc)
	for i := 0; i < n; i++ {
		meanRow(c, out[i*c.width:(i+1)*c.width], ls, res[i*nc:(i+1)*nc])
	}
	return newDense(dt, res, n, nc), nil
}

// meanRow writes the per-column mean (mode for categories) of one record.
func meanRow(c *Columns, row, ls, dst []float64) {
	for j, col := range c.cols {
		o := row[c.offs[j]]
		logS := math.Log(col.sigma())
		if col.LearnSigma {
			logS = ls[j]
		}
		switch col.Kind {
		case ColumnReal:
			dst[j] = o
		case ColumnPositive:
			s := math.Exp(logS)
			dst[j] = math.Exp(o + 0.5*s*s)
		case ColumnCount:
			dst[j] = math.Exp(o)
		case ColumnBinary:
			dst[j] = 1 / (1 + math.Exp(-o))
		case ColumnCategorical:
			best := 0
			for k := 1; k < col.Categories; k++ {
				if row[c.offs[j]+k] > row[c.offs[j]+best] {
					best = k
				}
			}
			dst[j] = float64(best)
		}
	}
}

func (m *columnsMeanOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }
func (m *columnsMeanOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("losses: columns mean: has no gradient")
}
func (m *columnsMeanOp) ReturnsPtr() bool     { return false }
func (m *columnsMeanOp) CallsExtern() bool    { return false }
func (m *columnsMeanOp) OverwritesInput() int { return -1 }
func (m *columnsMeanOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "lowerbound.losses.columns_mean%v", m.c.cols)
}
func (m *columnsMeanOp) Hashcode() uint32 { return opHash(m) }
func (m *columnsMeanOp) String() string   { return "ColumnsMean" }
