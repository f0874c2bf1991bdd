package losses

import (
	"fmt"
	"hash"
	"hash/fnv"
	"math"

	"github.com/chewxy/hm"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/vecmath"
)

// The Bernoulli log-likelihood is the largest elementwise term of a typical
// model (one value per pixel or feature), so it runs as one fused gorgonia
// op, forward and backward, instead of a chain of a dozen elementwise ops
// with a temporary tensor each.
//
//	forward:  y = x*l - softplus(l),   softplus(l) = max(l, 0) + log1p(exp(-|l|))
//	backward: dy/dl = x - sigmoid(l),  dy/dx = l
//
// In float32 the tail log1p(exp(-|l|)) and the sigmoid come from the
// kernels of internal/vecmath (0.51 ulp each, one rounding); float64 uses
// package math.
//
// Each op keeps its output tensor and returns it from every run: gorgonia's
// tape machine clears its registers on Reset and would otherwise allocate a
// fresh (N, F) tensor per op per training step. The graph's consumers copy
// what they keep (gorgonia's Read, the gradient accumulation into the
// parameters' dual values), and a graph is run by one goroutine at a time,
// so reusing the buffer is safe; two graphs never share an op value.

// bernoulliOp computes y = x*l - softplus(l) elementwise from (x, l).
type bernoulliOp struct{ out *tensor.Dense }

func (*bernoulliOp) Arity() int { return 2 }

func (*bernoulliOp) Type() hm.Type {
	t := G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t)
}

func (*bernoulliOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	return sameShape("Bernoulli", in...)
}

func (op *bernoulliOp) Do(vals ...G.Value) (G.Value, error) {
	in, _, err := denseInputs("Bernoulli", 2, vals...)
	if err != nil {
		return nil, err
	}
	op.out = reuse(op.out, in[0])
	return op.UsePreallocDo(op.out, vals...)
}

// UsePreallocDo writes into prealloc.
func (*bernoulliOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (G.Value, error) {
	in, l, err := denseInputs("Bernoulli", 2, vals...)
	if err != nil {
		return nil, err
	}
	out, ok := prealloc.(*tensor.Dense)
	if !ok || out.Size() != l.Size() || out.Dtype() != l.Dtype() {
		return nil, fmt.Errorf("losses: Bernoulli: bad output buffer %T", prealloc)
	}
	switch o := out.Data().(type) {
	case []float64:
		bernoulliForward64(o, in[0].Data().([]float64), l.Data().([]float64))
	case []float32:
		bernoulliForward32(o, in[0].Data().([]float32), l.Data().([]float32))
	default:
		return nil, fmt.Errorf("losses: Bernoulli: dtype %v is not float32 or float64", out.Dtype())
	}
	return out, nil
}

// reuse returns buf when it is a dense tensor of like's shape and dtype,
// else a new one.
func reuse(buf, like *tensor.Dense) *tensor.Dense {
	if buf != nil && buf.Dtype() == like.Dtype() && buf.Shape().Eq(like.Shape()) {
		return buf
	}
	return tensor.New(tensor.WithShape(like.Shape().Clone()...), tensor.Of(like.Dtype()))
}

// (x*l - max(l, 0)) is computed first: it is exact for x in {0, 1}, so the
// small tail log1p(exp(-|l|)) keeps its precision.

func bernoulliForward64(out, x, l []float64) {
	x, out = x[:len(l)], out[:len(l)]
	for i, li := range l {
		out[i] = (x[i]*li - math.Max(li, 0)) - math.Log1p(math.Exp(-math.Abs(li)))
	}
}

func bernoulliForward32(out, x, l []float32) {
	x, out = x[:len(l)], out[:len(l)]
	for i, li := range l {
		relu, negAbs := li, -li
		if li < 0 {
			relu, negAbs = 0, li
		}
		out[i] = (x[i]*li - relu) - vecmath.Log1pExp32(negAbs)
	}
}

func (*bernoulliOp) DiffWRT(inputs int) []bool { return []bool{true, true} }

func (*bernoulliOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("losses: Bernoulli: want 2 inputs, have %d", len(inputs))
	}
	x, l := inputs[0], inputs[1]
	gx, err := G.HadamardProd(grad, l)
	if err != nil {
		return nil, err
	}
	gl, err := G.ApplyOp(&bernoulliGradOp{}, x, l, grad)
	if err != nil {
		return nil, err
	}
	return G.Nodes{gx, gl}, nil
}

func (*bernoulliOp) ReturnsPtr() bool      { return false }
func (*bernoulliOp) CallsExtern() bool     { return false }
func (*bernoulliOp) OverwritesInput() int  { return -1 }
func (*bernoulliOp) WriteHash(h hash.Hash) { fmt.Fprint(h, "lowerbound.losses.bernoulli") }
func (op *bernoulliOp) Hashcode() uint32   { return opHash(op) }
func (*bernoulliOp) String() string        { return "BernoulliLogProb" }

// bernoulliGradOp computes g*(x - sigmoid(l)) elementwise from (x, l, g):
// the gradient of the Bernoulli log-likelihood with respect to the logits,
// times the incoming gradient. It has no gradient of its own (no
// second-order derivatives).
type bernoulliGradOp struct{ out *tensor.Dense }

func (*bernoulliGradOp) Arity() int { return 3 }

func (*bernoulliGradOp) Type() hm.Type {
	t := G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t, t)
}

func (*bernoulliGradOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	return sameShape("Bernoulli gradient", in...)
}

func (op *bernoulliGradOp) Do(vals ...G.Value) (G.Value, error) {
	in, _, err := denseInputs("Bernoulli gradient", 3, vals...)
	if err != nil {
		return nil, err
	}
	op.out = reuse(op.out, in[0])
	return op.UsePreallocDo(op.out, vals...)
}

func (*bernoulliGradOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (G.Value, error) {
	in, g, err := denseInputs("Bernoulli gradient", 3, vals...)
	if err != nil {
		return nil, err
	}
	out, ok := prealloc.(*tensor.Dense)
	if !ok || out.Size() != g.Size() || out.Dtype() != g.Dtype() {
		return nil, fmt.Errorf("losses: Bernoulli gradient: bad output buffer %T", prealloc)
	}
	switch o := out.Data().(type) {
	case []float64:
		bernoulliBackward64(o, in[0].Data().([]float64), in[1].Data().([]float64), g.Data().([]float64))
	case []float32:
		bernoulliBackward32(o, in[0].Data().([]float32), in[1].Data().([]float32), g.Data().([]float32))
	default:
		return nil, fmt.Errorf("losses: Bernoulli gradient: dtype %v is not float32 or float64", out.Dtype())
	}
	return out, nil
}

// bernoulliBackward64 sets out[i] = g[i]*(x[i] - sigmoid(l[i])), in the
// form of vecmath.BernoulliDiff64.
func bernoulliBackward64(out, x, l, g []float64) {
	x, g, out = x[:len(l)], g[:len(l)], out[:len(l)]
	for i, li := range l {
		out[i] = g[i] * vecmath.BernoulliDiff64(x[i], li)
	}
}

func bernoulliBackward32(out, x, l, g []float32) {
	x, g, out = x[:len(l)], g[:len(l)], out[:len(l)]
	for i, li := range l {
		var d float32
		if li >= 0 {
			d = (x[i] - 1) + vecmath.Sigmoid32(-li)
		} else {
			d = x[i] - vecmath.Sigmoid32(li)
		}
		out[i] = g[i] * d
	}
}

func (*bernoulliGradOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }

func (*bernoulliGradOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("losses: Bernoulli gradient: no second derivative")
}

func (*bernoulliGradOp) ReturnsPtr() bool      { return false }
func (*bernoulliGradOp) CallsExtern() bool     { return false }
func (*bernoulliGradOp) OverwritesInput() int  { return -1 }
func (*bernoulliGradOp) WriteHash(h hash.Hash) { fmt.Fprint(h, "lowerbound.losses.bernoulli_grad") }
func (op *bernoulliGradOp) Hashcode() uint32   { return opHash(op) }
func (*bernoulliGradOp) String() string        { return "BernoulliLogProbGrad" }

func opHash(op interface{ WriteHash(hash.Hash) }) uint32 {
	h := fnv.New32a()
	op.WriteHash(h)
	return h.Sum32()
}

// sameShape checks that every input has the same 2-D shape and returns it.
func sameShape(name string, in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) == 0 {
		return nil, fmt.Errorf("losses: %s: no inputs", name)
	}
	first, ok := in[0].(tensor.Shape)
	if !ok {
		return nil, fmt.Errorf("losses: %s: input 0 has no shape", name)
	}
	for i, s := range in[1:] {
		if sh, ok := s.(tensor.Shape); !ok || !sh.Eq(first) {
			return nil, fmt.Errorf("losses: %s: input %d has shape %v, want %v", name, i+1, s, first)
		}
	}
	return first.Clone(), nil
}

// denseInputs checks arity (at most 3), density, row-major layout and a
// common dtype and size; it returns the first arity-1 inputs and the last
// one.
func denseInputs(name string, arity int, vals ...G.Value) ([2]*tensor.Dense, *tensor.Dense, error) {
	var ds [3]*tensor.Dense
	if len(vals) != arity || arity > len(ds) {
		return [2]*tensor.Dense{}, nil, fmt.Errorf("losses: %s: want %d inputs, have %d", name, arity, len(vals))
	}
	for i, v := range vals {
		d, ok := v.(*tensor.Dense)
		if !ok {
			return [2]*tensor.Dense{}, nil, fmt.Errorf("losses: %s: input %d is a %T, want a dense tensor", name, i, v)
		}
		if d.IsView() {
			d = d.Materialize().(*tensor.Dense)
		}
		if i > 0 && (d.Dtype() != ds[0].Dtype() || d.Size() != ds[0].Size()) {
			return [2]*tensor.Dense{}, nil, fmt.Errorf("losses: %s: input %d is %v of %d values, input 0 is %v of %d", name, i, d.Dtype(), d.Size(), ds[0].Dtype(), ds[0].Size())
		}
		ds[i] = d
	}
	return [2]*tensor.Dense{ds[0], ds[1]}, ds[arity-1], nil
}

// The Bernoulli likelihood of a record is the sum of its F per-feature
// terms. bernoulliRowsOp computes those sums directly, so that training
// needs neither the (N, F) tensor of terms nor gorgonia's sum over features,
// whose gradient broadcasts the (N) incoming gradient into a newly
// allocated (N, F) tensor at every step:
//
//	forward:  s_r = sum_f x_rf*l_rf - softplus(l_rf)
//	backward: ds/dl_rf = g_r*(x_rf - sigmoid(l_rf)),  ds/dx_rf = g_r*l_rf
//
// In float32 these per-record sums (the training loss) use the fast kernels
// of internal/vecmath (BernoulliRowSum32, BernoulliGradRow32: float32
// polynomials, eight values at a time in AVX2 assembly on amd64): each term's
// softplus tail log1p(e^-|l|) is within 4 ulp and each gradient term
// x - sigmoid(l) within 4 ulp (for x in {0, 1}) of the exact values, against
// 0.51 ulp for the elementwise op above; the sum is accumulated in float64.

// bernoulliPerSample returns the (N) per-record Bernoulli log-likelihoods
// of the (N, F) observations x under the logits: the same values as
// PerSample(BernoulliLogProb(x, logits)), with the same argument checks,
// as one op.
//
// With noGradX (x marked as data in the scope) the op has no gradient with
// respect to x.
func bernoulliPerSample(x, logits *G.Node, noGradX bool) (*G.Node, error) {
	const where = "losses.BernoulliLogProb"
	if err := checkMatrix(where, "x", x); err != nil {
		return nil, err
	}
	if err := checkSame(where, "logits", logits, "x", x); err != nil {
		return nil, err
	}
	out, err := G.ApplyOp(&bernoulliRowsOp{noGradX: noGradX}, x, logits)
	if err != nil {
		return nil, opError(where, "Bernoulli", err)
	}
	return out, nil
}

type bernoulliRowsOp struct {
	noGradX bool
	out     *tensor.Dense
}

func (*bernoulliRowsOp) Arity() int { return 2 }

func (*bernoulliRowsOp) Type() hm.Type {
	a := hm.TypeVariable('a')
	t := G.TensorType{Dims: 2, Of: a}
	return hm.NewFnType(t, t, G.TensorType{Dims: 1, Of: a})
}

func (*bernoulliRowsOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	s, err := sameShape("Bernoulli", in...)
	if err != nil {
		return nil, err
	}
	return tensor.Shape{s[0]}, nil
}

func (op *bernoulliRowsOp) Do(vals ...G.Value) (G.Value, error) {
	in, l, err := denseInputs("Bernoulli", 2, vals...)
	if err != nil {
		return nil, err
	}
	sh := l.Shape()
	if sh.Dims() != 2 {
		return nil, fmt.Errorf("losses: Bernoulli: logits of shape %v, want (N, F)", sh)
	}
	n, f := sh[0], sh[1]
	if op.out == nil || op.out.Dtype() != l.Dtype() || op.out.Size() != n {
		op.out = tensor.New(tensor.WithShape(n), tensor.Of(l.Dtype()))
	}
	switch s := op.out.Data().(type) {
	case []float64:
		xs, ls := in[0].Data().([]float64), l.Data().([]float64)
		for r := 0; r < n; r++ {
			s[r] = vecmath.BernoulliRowSum64(xs[r*f:(r+1)*f], ls[r*f:(r+1)*f])
		}
	case []float32:
		xs, ls := in[0].Data().([]float32), l.Data().([]float32)
		for r := 0; r < n; r++ {
			// Fast kernels (a few ulp per term), float64 accumulation.
			s[r] = float32(vecmath.BernoulliRowSum32(xs[r*f:(r+1)*f], ls[r*f:(r+1)*f]))
		}
	default:
		return nil, fmt.Errorf("losses: Bernoulli: dtype %v is not float32 or float64", l.Dtype())
	}
	return op.out, nil
}

func (op *bernoulliRowsOp) DiffWRT(inputs int) []bool { return []bool{!op.noGradX, true} }

func (op *bernoulliRowsOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("losses: Bernoulli: want 2 inputs, have %d", len(inputs))
	}
	x, l := inputs[0], inputs[1]
	var gx *G.Node // nil: gorgonia skips inputs that DiffWRT excludes
	if !op.noGradX {
		var err error
		if gx, err = G.ApplyOp(&bernoulliRowsGradOp{wrtX: true}, x, l, grad); err != nil {
			return nil, err
		}
	}
	gl, err := G.ApplyOp(&bernoulliRowsGradOp{}, x, l, grad)
	if err != nil {
		return nil, err
	}
	return G.Nodes{gx, gl}, nil
}

func (*bernoulliRowsOp) ReturnsPtr() bool     { return false }
func (*bernoulliRowsOp) CallsExtern() bool    { return false }
func (*bernoulliRowsOp) OverwritesInput() int { return -1 }
func (op *bernoulliRowsOp) WriteHash(h hash.Hash) {
	fmt.Fprint(h, "lowerbound.losses.bernoulli_rows")
	if op.noGradX {
		fmt.Fprint(h, "(no dx)")
	}
}
func (op *bernoulliRowsOp) Hashcode() uint32 { return opHash(op) }
func (*bernoulliRowsOp) String() string      { return "BernoulliLogProbRows" }

// bernoulliRowsGradOp computes, from (x, l, g) with g of shape (N), either
// g_r*(x_rf - sigmoid(l_rf)) (the gradient with respect to the logits) or,
// with wrtX, g_r*l_rf (with respect to x). It has no gradient of its own.
type bernoulliRowsGradOp struct {
	wrtX bool
	out  *tensor.Dense
}

func (*bernoulliRowsGradOp) Arity() int { return 3 }

func (*bernoulliRowsGradOp) Type() hm.Type {
	a := hm.TypeVariable('a')
	t := G.TensorType{Dims: 2, Of: a}
	return hm.NewFnType(t, t, G.TensorType{Dims: 1, Of: a}, t)
}

func (*bernoulliRowsGradOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	if len(in) != 3 {
		return nil, fmt.Errorf("losses: Bernoulli gradient: want 3 inputs, have %d", len(in))
	}
	return sameShape("Bernoulli gradient", in[:2]...)
}

func (op *bernoulliRowsGradOp) Do(vals ...G.Value) (G.Value, error) {
	if len(vals) != 3 {
		return nil, fmt.Errorf("losses: Bernoulli gradient: want 3 inputs, have %d", len(vals))
	}
	in, l, err := denseInputs("Bernoulli gradient", 2, vals[:2]...)
	if err != nil {
		return nil, err
	}
	g, ok := vals[2].(*tensor.Dense)
	sh := l.Shape()
	if !ok || sh.Dims() != 2 || g.Size() != sh[0] || g.Dtype() != l.Dtype() {
		return nil, fmt.Errorf("losses: Bernoulli gradient: incoming gradient %v does not match logits of shape %v", vals[2], sh)
	}
	if g.IsView() {
		g = g.Materialize().(*tensor.Dense)
	}
	f := sh[1]
	op.out = reuse(op.out, l)
	switch o := op.out.Data().(type) {
	case []float64:
		xs, ls, gs := in[0].Data().([]float64), l.Data().([]float64), g.Data().([]float64)
		for r, gr := range gs {
			lo, hi := r*f, (r+1)*f
			if op.wrtX {
				for i, li := range ls[lo:hi] {
					o[lo+i] = gr * li
				}
				continue
			}
			vecmath.BernoulliGradRow64(o[lo:hi], xs[lo:hi], ls[lo:hi], gr)
		}
	case []float32:
		xs, ls, gs := in[0].Data().([]float32), l.Data().([]float32), g.Data().([]float32)
		for r, gr := range gs {
			lo, hi := r*f, (r+1)*f
			if op.wrtX {
				for i, li := range ls[lo:hi] {
					o[lo+i] = gr * li
				}
				continue
			}
			vecmath.BernoulliGradRow32(o[lo:hi], xs[lo:hi], ls[lo:hi], gr)
		}
	default:
		return nil, fmt.Errorf("losses: Bernoulli gradient: dtype %v is not float32 or float64", l.Dtype())
	}
	return op.out, nil
}

func (*bernoulliRowsGradOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }

func (*bernoulliRowsGradOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("losses: Bernoulli gradient: no second derivative")
}

func (*bernoulliRowsGradOp) ReturnsPtr() bool     { return false }
func (*bernoulliRowsGradOp) CallsExtern() bool    { return false }
func (*bernoulliRowsGradOp) OverwritesInput() int { return -1 }
func (op *bernoulliRowsGradOp) WriteHash(h hash.Hash) {
	fmt.Fprintf(h, "lowerbound.losses.bernoulli_rows_grad(%t)", op.wrtX)
}
func (op *bernoulliRowsGradOp) Hashcode() uint32 { return opHash(op) }
func (op *bernoulliRowsGradOp) String() string {
	if op.wrtX {
		return "BernoulliLogProbRowsGradX"
	}
	return "BernoulliLogProbRowsGrad"
}
