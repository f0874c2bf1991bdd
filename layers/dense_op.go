package layers

import (
	"fmt"
	"hash"
	"hash/fnv"
	"math"

	"github.com/chewxy/hm"
	"gonum.org/v1/gonum/blas"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/vecmath"
)

// A Dense layer and the activation after it run as one gorgonia op,
// forward and backward, instead of a matrix product, a bias broadcast (a
// repeat and an add) and two to five elementwise ops, each with its own
// pass over the (N, out) activations and its own temporary tensor:
//
//	forward:  y = act(x W + b)     rows of y set to b, then one GEMM with
//	                               beta = 1, then act in place
//	backward: d  = g ⊙ act'(y)     one pass (skipped for Identity)
//	          dx = d Wᵀ,  dW = xᵀ d,  db = column sums of d
//
// act' is computed from the output y alone, so the op keeps no
// pre-activation: ReLU and LeakyReLU carry the sign of the pre-activation in
// y (y = +0 for a pre-activation of ±0, y = -0 or a negative value below),
// which gives derivative 1 at 0 as Rectify's x*(x >= 0) does; tanh' = 1 - y²,
// sigmoid' = y(1 - y), softplus' = 1 - e^-y, ELU' = y + alpha below zero.
//
// In float32, tanh uses the fast kernel of internal/vecmath (float32
// polynomial, AVX2 assembly on amd64, at most 3 ulp against math.Tanh); the
// other activations the 0.51-ulp kernels.
//
// The matrix products go through gorgonia's current BLAS (G.WhichBLAS), so
// an implementation installed with G.Use serves these ops too.
//
// Every op keeps its output tensor and returns it from each run: gorgonia's
// tape machine clears its registers on Reset and would otherwise allocate
// every output again at each training step. The graph's consumers copy what
// they keep (gorgonia's Read, the accumulation of gradients into the
// parameters' dual values), a graph is run by one goroutine at a time, and
// no two graphs share an op value, so reusing the buffers is safe.

// denseOp computes act(x W + b) from (x, W, b).
//
// With noGradX (x marked as data in its Scope) the op has no gradient with
// respect to x, and its backward pass skips the product d Wᵀ.
type denseOp struct {
	act     Activation
	noGradX bool
	out     *tensor.Dense
}

// fusable reports whether a has a fused forward and backward.
func fusable(a Activation) bool {
	switch a {
	case Identity, ReLU, LeakyReLU, Tanh, Sigmoid, Softplus, ELU:
		return true
	}
	return false
}

var matrixType = G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}

func (*denseOp) Arity() int { return 3 }

func (*denseOp) Type() hm.Type {
	return hm.NewFnType(matrixType, matrixType, matrixType, matrixType)
}

func (op *denseOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 3 {
		return nil, fmt.Errorf("layers: %v: want 3 inputs, have %d", op, len(in))
	}
	x, ok1 := in[0].(tensor.Shape)
	w, ok2 := in[1].(tensor.Shape)
	b, ok3 := in[2].(tensor.Shape)
	if !ok1 || !ok2 || !ok3 || x.Dims() != 2 || w.Dims() != 2 || x[1] != w[0] || b.TotalSize() != w[1] {
		return nil, fmt.Errorf("layers: %v: shapes %v, %v, %v do not make (N, in) x (in, out) + (1, out)", op, in[0], in[1], in[2])
	}
	return tensor.Shape{x[0], w[1]}, nil
}

func (op *denseOp) Do(vals ...G.Value) (G.Value, error) {
	ds, err := denseValues(op, 3, vals)
	if err != nil {
		return nil, err
	}
	x, w, b := ds[0], ds[1], ds[2]
	n, in, out := x.Shape()[0], x.Shape()[1], w.Shape()[1]
	if x.Shape().Dims() != 2 || w.Shape().Dims() != 2 || w.Shape()[0] != in || b.Size() != out {
		return nil, fmt.Errorf("layers: %v: shapes %v, %v, %v do not make (N, in) x (in, out) + (1, out)", op, x.Shape(), w.Shape(), b.Shape())
	}
	op.out = keep(op.out, x.Dtype(), n, out)
	switch y := op.out.Data().(type) {
	case []float32:
		xs, ws, bs := x.Data().([]float32), w.Data().([]float32), b.Data().([]float32)
		for r := 0; r < n; r++ {
			copy(y[r*out:(r+1)*out], bs)
		}
		G.WhichBLAS().Sgemm(blas.NoTrans, blas.NoTrans, n, out, in, 1, xs, in, ws, out, 1, y, out)
		activate32(op.act, y)
	case []float64:
		xs, ws, bs := x.Data().([]float64), w.Data().([]float64), b.Data().([]float64)
		for r := 0; r < n; r++ {
			copy(y[r*out:(r+1)*out], bs)
		}
		G.WhichBLAS().Dgemm(blas.NoTrans, blas.NoTrans, n, out, in, 1, xs, in, ws, out, 1, y, out)
		activate64(op.act, y)
	}
	return op.out, nil
}

func (op *denseOp) DiffWRT(int) []bool { return []bool{!op.noGradX, true, true} }

func (op *denseOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 3 {
		return nil, fmt.Errorf("layers: %v: want 3 inputs, have %d", op, len(inputs))
	}
	x, w := inputs[0], inputs[1]
	d := grad
	if op.act != Identity {
		var err error
		if d, err = G.ApplyOp(&actGradOp{act: op.act}, output, grad); err != nil {
			return nil, err
		}
	}
	var gx *G.Node // nil: gorgonia skips inputs that DiffWRT excludes
	if !op.noGradX {
		var err error
		if gx, err = G.ApplyOp(&gemmOp{transB: true}, d, w); err != nil {
			return nil, err
		}
	}
	gw, err := G.ApplyOp(&gemmOp{transA: true}, x, d)
	if err != nil {
		return nil, err
	}
	gb, err := G.ApplyOp(&colSumOp{}, d)
	if err != nil {
		return nil, err
	}
	return G.Nodes{gx, gw, gb}, nil
}

func (*denseOp) ReturnsPtr() bool     { return false }
func (*denseOp) CallsExtern() bool    { return false }
func (*denseOp) OverwritesInput() int { return -1 }
func (op *denseOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "lowerbound.layers.dense(%s)", op.act)
	if op.noGradX {
		fmt.Fprint(h, "(no dx)")
	}
}
func (op *denseOp) Hashcode() uint32 { return opHash(op) }
func (op *denseOp) String() string   { return "Dense(" + string(op.act) + ")" }

// actGradOp computes g ⊙ act'(y) from (y, g), y being the activation's
// output. It has no gradient of its own.
type actGradOp struct {
	act Activation
	out *tensor.Dense
}

func (*actGradOp) Arity() int { return 2 }

func (*actGradOp) Type() hm.Type { return hm.NewFnType(matrixType, matrixType, matrixType) }

func (op *actGradOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 2 {
		return nil, fmt.Errorf("layers: %v: want 2 inputs, have %d", op, len(in))
	}
	y, ok1 := in[0].(tensor.Shape)
	g, ok2 := in[1].(tensor.Shape)
	if !ok1 || !ok2 || !y.Eq(g) {
		return nil, fmt.Errorf("layers: %v: shapes %v and %v differ", op, in[0], in[1])
	}
	return y.Clone(), nil
}

func (op *actGradOp) Do(vals ...G.Value) (G.Value, error) {
	ds, err := denseValues(op, 2, vals)
	if err != nil {
		return nil, err
	}
	y, g := ds[0], ds[1]
	if !y.Shape().Eq(g.Shape()) || y.Shape().Dims() != 2 {
		return nil, fmt.Errorf("layers: %v: shapes %v and %v differ", op, y.Shape(), g.Shape())
	}
	op.out = keep(op.out, y.Dtype(), y.Shape()[0], y.Shape()[1])
	switch d := op.out.Data().(type) {
	case []float32:
		actGrad(op.act, d, y.Data().([]float32), g.Data().([]float32))
	case []float64:
		actGrad(op.act, d, y.Data().([]float64), g.Data().([]float64))
	}
	return op.out, nil
}

func (*actGradOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }
func (op *actGradOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("layers: %v: no second derivative", op)
}
func (*actGradOp) ReturnsPtr() bool     { return false }
func (*actGradOp) CallsExtern() bool    { return false }
func (*actGradOp) OverwritesInput() int { return -1 }
func (op *actGradOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "lowerbound.layers.dense_act_grad(%s)", op.act)
}
func (op *actGradOp) Hashcode() uint32 { return opHash(op) }
func (op *actGradOp) String() string   { return "DenseActGrad(" + string(op.act) + ")" }

// gemmOp computes op(a) op(b), op transposing its argument when the flag is
// set, through gorgonia's current BLAS. It has no gradient of its own.
type gemmOp struct {
	transA, transB bool
	out            *tensor.Dense
}

func (*gemmOp) Arity() int { return 2 }

func (*gemmOp) Type() hm.Type { return hm.NewFnType(matrixType, matrixType, matrixType) }

// dims returns the (m, k) of op(a), the (k2, n) of op(b).
func (op *gemmOp) dims(a, b tensor.Shape) (m, k, k2, n int) {
	m, k = a[0], a[1]
	if op.transA {
		m, k = k, m
	}
	k2, n = b[0], b[1]
	if op.transB {
		k2, n = n, k2
	}
	return m, k, k2, n
}

func (op *gemmOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 2 {
		return nil, fmt.Errorf("layers: %v: want 2 inputs, have %d", op, len(in))
	}
	a, ok1 := in[0].(tensor.Shape)
	b, ok2 := in[1].(tensor.Shape)
	if !ok1 || !ok2 || a.Dims() != 2 || b.Dims() != 2 {
		return nil, fmt.Errorf("layers: %v: inputs %v and %v are not matrices", op, in[0], in[1])
	}
	m, k, k2, n := op.dims(a, b)
	if k != k2 {
		return nil, fmt.Errorf("layers: %v: inner sizes %d and %d differ", op, k, k2)
	}
	return tensor.Shape{m, n}, nil
}

func (op *gemmOp) Do(vals ...G.Value) (G.Value, error) {
	ds, err := denseValues(op, 2, vals)
	if err != nil {
		return nil, err
	}
	a, b := ds[0], ds[1]
	if a.Shape().Dims() != 2 || b.Shape().Dims() != 2 {
		return nil, fmt.Errorf("layers: %v: inputs %v and %v are not matrices", op, a.Shape(), b.Shape())
	}
	m, k, k2, n := op.dims(a.Shape(), b.Shape())
	if k != k2 {
		return nil, fmt.Errorf("layers: %v: inner sizes %d and %d differ", op, k, k2)
	}
	tA, tB := blas.NoTrans, blas.NoTrans
	if op.transA {
		tA = blas.Trans
	}
	if op.transB {
		tB = blas.Trans
	}
	lda, ldb := a.Shape()[1], b.Shape()[1]
	op.out = keep(op.out, a.Dtype(), m, n)
	switch c := op.out.Data().(type) {
	case []float32:
		G.WhichBLAS().Sgemm(tA, tB, m, n, k, 1, a.Data().([]float32), lda, b.Data().([]float32), ldb, 0, c, n)
	case []float64:
		G.WhichBLAS().Dgemm(tA, tB, m, n, k, 1, a.Data().([]float64), lda, b.Data().([]float64), ldb, 0, c, n)
	}
	return op.out, nil
}

func (*gemmOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }
func (op *gemmOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("layers: %v: no second derivative", op)
}
func (*gemmOp) ReturnsPtr() bool     { return false }
func (*gemmOp) CallsExtern() bool    { return false }
func (*gemmOp) OverwritesInput() int { return -1 }
func (op *gemmOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "lowerbound.layers.gemm(%t,%t)", op.transA, op.transB)
}
func (op *gemmOp) Hashcode() uint32 { return opHash(op) }
func (op *gemmOp) String() string {
	return fmt.Sprintf("Gemm(transA=%t, transB=%t)", op.transA, op.transB)
}

// colSumOp sums a matrix over its rows into a (1, cols) row: the bias
// gradient. It has no gradient of its own.
type colSumOp struct{ out *tensor.Dense }

func (*colSumOp) Arity() int { return 1 }

func (*colSumOp) Type() hm.Type { return hm.NewFnType(matrixType, matrixType) }

func (op *colSumOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 1 {
		return nil, fmt.Errorf("layers: %v: want 1 input, have %d", op, len(in))
	}
	s, ok := in[0].(tensor.Shape)
	if !ok || s.Dims() != 2 {
		return nil, fmt.Errorf("layers: %v: input %v is not a matrix", op, in[0])
	}
	return tensor.Shape{1, s[1]}, nil
}

func (op *colSumOp) Do(vals ...G.Value) (G.Value, error) {
	ds, err := denseValues(op, 1, vals)
	if err != nil {
		return nil, err
	}
	d := ds[0]
	if d.Shape().Dims() != 2 {
		return nil, fmt.Errorf("layers: %v: input %v is not a matrix", op, d.Shape())
	}
	cols := d.Shape()[1]
	op.out = keep(op.out, d.Dtype(), 1, cols)
	switch s := op.out.Data().(type) {
	case []float32:
		colSum(s, d.Data().([]float32))
	case []float64:
		colSum(s, d.Data().([]float64))
	}
	return op.out, nil
}

func colSum[T float32 | float64](s, d []T) {
	clear(s)
	for r := 0; r+len(s) <= len(d); r += len(s) {
		row := d[r : r+len(s)]
		for j, v := range row {
			s[j] += v
		}
	}
}

func (*colSumOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }
func (op *colSumOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("layers: %v: no second derivative", op)
}
func (*colSumOp) ReturnsPtr() bool      { return false }
func (*colSumOp) CallsExtern() bool     { return false }
func (*colSumOp) OverwritesInput() int  { return -1 }
func (*colSumOp) WriteHash(h hash.Hash) { fmt.Fprint(h, "lowerbound.layers.col_sum") }
func (op *colSumOp) Hashcode() uint32   { return opHash(op) }
func (*colSumOp) String() string        { return "ColSum" }

func opHash(op interface{ WriteHash(hash.Hash) }) uint32 {
	h := fnv.New32a()
	op.WriteHash(h)
	return h.Sum32()
}

// keep returns buf when it is a (rows, cols) tensor of dtype dt, else a new
// one.
func keep(buf *tensor.Dense, dt tensor.Dtype, rows, cols int) *tensor.Dense {
	if buf != nil && buf.Dtype() == dt && buf.Shape().Eq(tensor.Shape{rows, cols}) {
		return buf
	}
	return tensor.New(tensor.WithShape(rows, cols), tensor.Of(dt))
}

// denseValues checks that vals are arity dense float32 or float64 tensors
// of one dtype and returns them in row-major memory order (a view is
// copied). It allocates nothing for arity <= 3 and non-view inputs.
func denseValues(op fmt.Stringer, arity int, vals []G.Value) ([3]*tensor.Dense, error) {
	var ds [3]*tensor.Dense
	if len(vals) != arity || arity > len(ds) {
		return ds, fmt.Errorf("layers: %v: want %d inputs, have %d", op, arity, len(vals))
	}
	for i, v := range vals {
		d, ok := v.(*tensor.Dense)
		if !ok {
			return ds, fmt.Errorf("layers: %v: input %d is a %T, want a dense tensor", op, i, v)
		}
		if dt := d.Dtype(); dt != tensor.Float32 && dt != tensor.Float64 {
			return ds, fmt.Errorf("layers: %v: input %d has dtype %v, want float32 or float64", op, i, dt)
		}
		if i > 0 && d.Dtype() != ds[0].Dtype() {
			return ds, fmt.Errorf("layers: %v: input %d has dtype %v, input 0 has %v", op, i, d.Dtype(), ds[0].Dtype())
		}
		if d.IsView() || !d.DataOrder().IsRowMajor() {
			d = d.Materialize().(*tensor.Dense)
		}
		ds[i] = d
	}
	return ds, nil
}

// nonNegative reports whether v is >= 0 with a clear sign bit: +0 and
// positive values, not -0, negatives or NaN. For the outputs of ReLU,
// LeakyReLU and ELU it says whether the pre-activation was >= 0.
func nonNegative[T float32 | float64](v T) bool {
	return v > 0 || (v == 0 && !math.Signbit(float64(v)))
}

func activate32(a Activation, y []float32) {
	switch a {
	case ReLU:
		// (v + 0) * (v >= 0): -0 becomes +0, a negative v -0, -Inf and
		// NaN NaN, as x*(x >= 0) gives. The 0 or 1 is chosen on integer
		// bits so that the loop has no branch to mispredict on the signs.
		for i, v := range y {
			k := uint32(0)
			if v >= 0 {
				k = 0x3f800000 // 1
			}
			y[i] = (v + 0) * math.Float32frombits(k)
		}
	case LeakyReLU:
		for i, v := range y {
			if v >= 0 {
				y[i] = v + 0
			} else {
				y[i] = v * LeakySlope
			}
		}
	case Tanh:
		// Fast kernel: at most 3 ulp (vecmath.TanhSlice32).
		vecmath.TanhSlice32(y)
	case Sigmoid:
		for i, v := range y {
			y[i] = vecmath.Sigmoid32(v)
		}
	case Softplus:
		for i, v := range y {
			y[i] = vecmath.Log1pExp32(v)
		}
	case ELU:
		for i, v := range y {
			if v >= 0 {
				y[i] = v + 0
			} else {
				y[i] = float32(ELUAlpha * math.Expm1(float64(v)))
			}
		}
	}
}

func activate64(a Activation, y []float64) {
	switch a {
	case ReLU:
		for i, v := range y {
			if v >= 0 {
				y[i] = v + 0
			} else {
				y[i] = v * 0
			}
		}
	case LeakyReLU:
		for i, v := range y {
			if v >= 0 {
				y[i] = v + 0
			} else {
				y[i] = v * LeakySlope
			}
		}
	case Tanh:
		for i, v := range y {
			y[i] = math.Tanh(v)
		}
	case Sigmoid:
		for i, v := range y {
			// 1/(1 + e^-v) for v >= 0, e^v/(1 + e^v) below: no overflow.
			if v >= 0 {
				y[i] = 1 / (1 + math.Exp(-v))
			} else {
				e := math.Exp(v)
				y[i] = e / (1 + e)
			}
		}
	case Softplus:
		for i, v := range y {
			y[i] = math.Max(v, 0) + math.Log1p(math.Exp(-math.Abs(v)))
		}
	case ELU:
		for i, v := range y {
			if v >= 0 {
				y[i] = v + 0
			} else {
				y[i] = ELUAlpha * math.Expm1(v)
			}
		}
	}
}

// actGrad writes g ⊙ act'(y) into d, y being the activation's output.
func actGrad[T float32 | float64](a Activation, d, y, g []T) {
	y, g = y[:len(d)], g[:len(d)]
	switch a {
	case ReLU:
		if d32, ok := any(d).([]float32); ok {
			reluGrad32(d32, any(y).([]float32), any(g).([]float32))
		} else {
			reluGrad64(any(d).([]float64), any(y).([]float64), any(g).([]float64))
		}
	case LeakyReLU:
		for i, v := range y {
			m := T(LeakySlope)
			if nonNegative(v) {
				m = 1
			}
			d[i] = g[i] * m
		}
	case Tanh:
		for i, v := range y {
			d[i] = g[i] * (1 - v*v)
		}
	case Sigmoid:
		for i, v := range y {
			d[i] = g[i] * (v * (1 - v))
		}
	case Softplus:
		for i, v := range y {
			// sigmoid(x) = 1 - e^-softplus(x), exact where y is tiny too.
			d[i] = g[i] * T(-math.Expm1(-float64(v)))
		}
	case ELU:
		for i, v := range y {
			m := v + ELUAlpha
			if nonNegative(v) {
				m = 1
			}
			d[i] = g[i] * m
		}
	default:
		copy(d, g)
	}
}

// reluGrad32 sets d[i] = g[i] * (1 if nonNegative(y[i]) else 0) without a
// branch: the factor is 1 when y's sign bit is clear and y is not NaN.
func reluGrad32(d, y, g []float32) {
	y, g = y[:len(d)], g[:len(d)]
	for i, v := range y {
		b := int32(math.Float32bits(v))
		neg := b >> 31                               // all ones when the sign bit is set
		nan := (0x7f800000 - (b & 0x7fffffff)) >> 31 // all ones for NaN
		d[i] = g[i] * math.Float32frombits(uint32(0x3f800000&^(neg|nan)))
	}
}

// reluGrad64 is reluGrad32 for float64.
func reluGrad64(d, y, g []float64) {
	y, g = y[:len(d)], g[:len(d)]
	for i, v := range y {
		b := int64(math.Float64bits(v))
		neg := b >> 63
		nan := (0x7ff0000000000000 - (b & 0x7fffffffffffffff)) >> 63
		d[i] = g[i] * math.Float64frombits(uint64(0x3ff0000000000000&^(neg|nan)))
	}
}
