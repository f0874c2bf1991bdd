package losses

import (
	"fmt"
	"hash"
	"hash/fnv"
	"math"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// argError returns an error that names the function and the argument and
// wraps layers.ErrInvalidArgument.
func argError(where, arg, format string, a ...any) error {
	return fmt.Errorf("%s: %s: %s: %w", where, arg, fmt.Sprintf(format, a...), layers.ErrInvalidArgument)
}

// opError wraps an error from gorgonia while building the graph.
func opError(where, step string, err error) error {
	return fmt.Errorf("%s: %s: %w", where, step, err)
}

// checkFloat reports whether dt is one of the supported dtypes.
func checkFloat(where, arg string, n *G.Node) error {
	if dt := n.Dtype(); dt != tensor.Float32 && dt != tensor.Float64 {
		return argError(where, arg, "dtype %v is not float32 or float64", dt)
	}
	return nil
}

// checkMatrix checks that n is a non-nil float matrix with no empty axis.
func checkMatrix(where, arg string, n *G.Node) error {
	if n == nil {
		return argError(where, arg, "nil node")
	}
	s := n.Shape()
	if s.Dims() != 2 {
		return argError(where, arg, "want a matrix of shape (N, D), have shape %v", s)
	}
	if s[0] < 1 || s[1] < 1 {
		return argError(where, arg, "empty shape %v", s)
	}
	return checkFloat(where, arg, n)
}

// checkSame checks that n is a matrix of the same shape and dtype as ref.
func checkSame(where, arg string, n *G.Node, refArg string, ref *G.Node) error {
	if err := checkMatrix(where, arg, n); err != nil {
		return err
	}
	if !n.Shape().Eq(ref.Shape()) {
		return argError(where, arg, "shape %v differs from %s's %v", n.Shape(), refArg, ref.Shape())
	}
	if n.Dtype() != ref.Dtype() {
		return argError(where, arg, "dtype %v differs from %s's %v", n.Dtype(), refArg, ref.Dtype())
	}
	return nil
}

// checkRows checks that n is a matrix with ref's columns and dtype and
// either ref's number of rows or a single row (broadcast over ref's rows).
func checkRows(where, arg string, n *G.Node, refArg string, ref *G.Node) error {
	if err := checkMatrix(where, arg, n); err != nil {
		return err
	}
	ns, rs := n.Shape(), ref.Shape()
	if ns[1] != rs[1] || (ns[0] != rs[0] && ns[0] != 1) {
		return argError(where, arg, "want shape (%d, %d) or (1, %d) to match %s, have %v", rs[0], rs[1], rs[1], refArg, ns)
	}
	if n.Dtype() != ref.Dtype() {
		return argError(where, arg, "dtype %v differs from %s's %v", n.Dtype(), refArg, ref.Dtype())
	}
	return nil
}

// scalar returns a constant scalar v in the dtype of n.
func scalar(n *G.Node, v float64) *G.Node {
	if n.Dtype() == tensor.Float32 {
		return G.NewConstant(float32(v))
	}
	return G.NewConstant(v)
}

type broadcastFn func(a, b *G.Node, left, right []byte) (*G.Node, error)

// rowwise applies an elementwise binary op to two matrices of equal
// columns where either may be a single row broadcast over the other's rows.
// The caller has checked the shapes.
func rowwise(op broadcastFn, plain func(a, b *G.Node) (*G.Node, error), a, b *G.Node) (*G.Node, error) {
	as, bs := a.Shape(), b.Shape()
	switch {
	case as.Eq(bs):
		return plain(a, b)
	case as[0] == 1:
		return op(a, b, []byte{0}, nil)
	default:
		return op(a, b, nil, []byte{0})
	}
}

func rowSub(a, b *G.Node) (*G.Node, error) { return rowwise(G.BroadcastSub, G.Sub, a, b) }
func rowAdd(a, b *G.Node) (*G.Node, error) { return rowwise(G.BroadcastAdd, G.Add, a, b) }
func rowMul(a, b *G.Node) (*G.Node, error) {
	return rowwise(G.BroadcastHadamardProd, G.HadamardProd, a, b)
}

// softplus returns log(1 + exp(l)) in the stable form
// max(l, 0) + log1p(exp(-|l|)); see softplusParts.
func softplus(l *G.Node) (*G.Node, error) {
	relu, tail, err := softplusParts(l)
	if err != nil {
		return nil, err
	}
	return G.Add(relu, tail)
}

// softplusParts returns the two terms of softplus(l) = max(l, 0) +
// log1p(exp(-|l|)) as separate nodes, so callers can subtract the large
// part first and keep the small one exact.
//
// max(l, 0) is written as l * (1 + sign(l))/2. gorgonia treats sign as a
// constant for gradients, so the gradient of that term is exactly 0 or 1 and
// the gradient of the sum is sigmoid(l) without cancellation: for l << 0 it
// is the tiny sigmoid(-|l|) itself, not 1/2 - (1/2 - sigmoid(l)). At l = 0
// the two terms' gradients add to 1/2 whatever sign(0) is.
//
// Note: gorgonia rewrites log1p(exp(x)) into its own Softplus op when the
// graph is built (stabilisation is on by default). Here x = -|l| <= 0, where
// that op is exact, so the rewrite cannot hurt.
func softplusParts(l *G.Node) (relu, tail *G.Node, err error) {
	abs, err := G.Abs(l)
	if err != nil {
		return nil, nil, err
	}
	negAbs, err := G.Neg(abs)
	if err != nil {
		return nil, nil, err
	}
	e, err := G.Exp(negAbs)
	if err != nil {
		return nil, nil, err
	}
	if tail, err = G.Log1p(e); err != nil {
		return nil, nil, err
	}
	sign, err := G.Sign(l)
	if err != nil {
		return nil, nil, err
	}
	step, err := G.Add(sign, scalar(l, 1))
	if err != nil {
		return nil, nil, err
	}
	if step, err = G.Mul(step, scalar(l, 0.5)); err != nil {
		return nil, nil, err
	}
	if relu, err = G.HadamardProd(l, step); err != nil {
		return nil, nil, err
	}
	return relu, tail, nil
}

// maxNoGrad is a gorgonia op that returns the maximum of a matrix along
// one axis, keeping that axis with size 1, and passes no gradient. A
// non-finite maximum (a slice of all -Inf, or one holding +Inf) is replaced
// by 0 so that a - max stays free of NaN.
type maxNoGrad struct{ axis int }

func (op maxNoGrad) Arity() int { return 1 }

func (op maxNoGrad) Type() hm.Type {
	t := G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t)
}

func (op maxNoGrad) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 1 {
		return nil, fmt.Errorf("losses: max: want 1 input, have %d", len(in))
	}
	s, ok := in[0].(tensor.Shape)
	if !ok || s.Dims() != 2 {
		return nil, fmt.Errorf("losses: max: want a matrix, have %v", in[0])
	}
	out := s.Clone()
	out[op.axis] = 1
	return out, nil
}

func (op maxNoGrad) Do(vals ...G.Value) (G.Value, error) {
	if len(vals) != 1 {
		return nil, fmt.Errorf("losses: max: want 1 input, have %d", len(vals))
	}
	t, ok := vals[0].(tensor.Tensor)
	if !ok || t.Shape().Dims() != 2 {
		return nil, fmt.Errorf("losses: max: want a matrix, have %T", vals[0])
	}
	rows, cols := t.Shape()[0], t.Shape()[1]
	outShape := tensor.Shape{rows, cols}
	outShape[op.axis] = 1
	d, ok := t.(*tensor.Dense)
	if !ok {
		return nil, fmt.Errorf("losses: max: want a dense tensor, have %T", t)
	}
	if d.IsView() {
		// Copy a view into row-major order first.
		t = d.Materialize()
	}
	switch data := t.Data().(type) {
	case []float64:
		out := maxAlong(data, rows, cols, op.axis)
		return tensor.New(tensor.WithShape(outShape...), tensor.WithBacking(out)), nil
	case []float32:
		out := maxAlong(data, rows, cols, op.axis)
		return tensor.New(tensor.WithShape(outShape...), tensor.WithBacking(out)), nil
	default:
		return nil, fmt.Errorf("losses: max: dtype %v is not float32 or float64", t.Dtype())
	}
}

// maxAlong returns the maxima of a row-major rows x cols matrix along axis,
// with NaN propagated and infinite maxima replaced by 0.
func maxAlong[T float32 | float64](data []T, rows, cols, axis int) []T {
	n := rows
	if axis == 0 {
		n = cols
	}
	out := make([]T, n)
	seen := make([]bool, n)
	for i := 0; i < rows; i++ {
		for j := 0; j < cols; j++ {
			v := data[i*cols+j]
			k := i
			if axis == 0 {
				k = j
			}
			switch {
			case !seen[k]:
				out[k], seen[k] = v, true
			case out[k] != out[k]: // a NaN, once seen, stays
			case v != v || v > out[k]:
				out[k] = v
			}
		}
	}
	for k, v := range out {
		if math.IsInf(float64(v), 0) {
			out[k] = 0
		}
	}
	return out
}

func (op maxNoGrad) ReturnsPtr() bool     { return false }
func (op maxNoGrad) CallsExtern() bool    { return false }
func (op maxNoGrad) OverwritesInput() int { return -1 }
func (op maxNoGrad) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "lowerbound.losses.maxNoGrad(%d)", op.axis)
}
func (op maxNoGrad) Hashcode() uint32 {
	h := fnv.New32a()
	op.WriteHash(h)
	return h.Sum32()
}
func (op maxNoGrad) String() string { return fmt.Sprintf("MaxNoGrad[%d]", op.axis) }

// DiffWRT reports that no gradient flows through the maximum: log-sum-exp
// treats it as a constant shift.
func (op maxNoGrad) DiffWRT(inputs int) []bool { return make([]bool, inputs) }

// SymDiff is never called for an op that is differentiable with respect to
// none of its inputs; it returns an error rather than a wrong gradient.
func (op maxNoGrad) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("losses: max: has no gradient")
}
