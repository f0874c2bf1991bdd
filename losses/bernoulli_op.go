package losses

import (
	"fmt"
	"hash"
	"hash/fnv"
	"math"

	"github.com/chewxy/hm"
	"github.com/chewxy/math32"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// The Bernoulli log-likelihood is the largest elementwise term of a typical
// model (one value per pixel or feature), so it runs as one fused gorgonia
// op, forward and backward, instead of a chain of a dozen elementwise ops
// with a temporary tensor each.
//
//	forward:  y = x*l - softplus(l),   softplus(l) = max(l, 0) + log1p(exp(-|l|))
//	backward: dy/dl = x - sigmoid(l),  dy/dx = l

// bernoulliOp computes y = x*l - softplus(l) elementwise from (x, l).
type bernoulliOp struct{}

func (bernoulliOp) Arity() int { return 2 }

func (bernoulliOp) Type() hm.Type {
	t := G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t)
}

func (bernoulliOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	return sameShape("Bernoulli", in...)
}

func (op bernoulliOp) Do(vals ...G.Value) (G.Value, error) {
	x, l, err := denseInputs("Bernoulli", 2, vals...)
	if err != nil {
		return nil, err
	}
	out := tensor.New(tensor.WithShape(x[0].Shape().Clone()...), tensor.Of(x[0].Dtype()))
	return op.UsePreallocDo(out, x[0], l)
}

// UsePreallocDo writes into prealloc, so the tape machine can reuse one
// output buffer across runs.
func (bernoulliOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (G.Value, error) {
	in, l, err := denseInputs("Bernoulli", 2, vals...)
	if err != nil {
		return nil, err
	}
	out, ok := prealloc.(*tensor.Dense)
	if !ok || out.Size() != l.Size() {
		return nil, fmt.Errorf("losses: Bernoulli: bad output buffer %T", prealloc)
	}
	switch o := out.Data().(type) {
	case []float64:
		bernoulliForward(o, in[0].Data().([]float64), l.Data().([]float64), math.Exp, math.Log1p)
	case []float32:
		bernoulliForward(o, in[0].Data().([]float32), l.Data().([]float32), math32.Exp, math32.Log1p)
	default:
		return nil, fmt.Errorf("losses: Bernoulli: dtype %v is not float32 or float64", out.Dtype())
	}
	return out, nil
}

func bernoulliForward[T float32 | float64](out, x, l []T, exp, log1p func(T) T) {
	for i, li := range l {
		a := li
		if a < 0 {
			a = -a
		}
		relu := li
		if relu < 0 {
			relu = 0
		}
		// (x*l - max(l, 0)) first: exact for x in {0, 1}, so the small
		// tail log1p(exp(-|l|)) keeps its precision.
		out[i] = (x[i]*li - relu) - log1p(exp(-a))
	}
}

func (bernoulliOp) DiffWRT(inputs int) []bool { return []bool{true, true} }

func (bernoulliOp) SymDiff(inputs G.Nodes, output, grad *G.Node) (G.Nodes, error) {
	if len(inputs) != 2 {
		return nil, fmt.Errorf("losses: Bernoulli: want 2 inputs, have %d", len(inputs))
	}
	x, l := inputs[0], inputs[1]
	gx, err := G.HadamardProd(grad, l)
	if err != nil {
		return nil, err
	}
	gl, err := G.ApplyOp(bernoulliGradOp{}, x, l, grad)
	if err != nil {
		return nil, err
	}
	return G.Nodes{gx, gl}, nil
}

func (bernoulliOp) ReturnsPtr() bool      { return false }
func (bernoulliOp) CallsExtern() bool     { return false }
func (bernoulliOp) OverwritesInput() int  { return -1 }
func (bernoulliOp) WriteHash(h hash.Hash) { fmt.Fprint(h, "lowerbound.losses.bernoulli") }
func (op bernoulliOp) Hashcode() uint32   { return opHash(op) }
func (bernoulliOp) String() string        { return "BernoulliLogProb" }

// bernoulliGradOp computes g*(x - sigmoid(l)) elementwise from (x, l, g):
// the gradient of the Bernoulli log-likelihood with respect to the logits,
// times the incoming gradient. It has no gradient of its own (no
// second-order derivatives).
type bernoulliGradOp struct{}

func (bernoulliGradOp) Arity() int { return 3 }

func (bernoulliGradOp) Type() hm.Type {
	t := G.TensorType{Dims: 2, Of: hm.TypeVariable('a')}
	return hm.NewFnType(t, t, t, t)
}

func (bernoulliGradOp) InferShape(in ...G.DimSizer) (tensor.Shape, error) {
	return sameShape("Bernoulli gradient", in...)
}

func (op bernoulliGradOp) Do(vals ...G.Value) (G.Value, error) {
	in, _, err := denseInputs("Bernoulli gradient", 3, vals...)
	if err != nil {
		return nil, err
	}
	out := tensor.New(tensor.WithShape(in[0].Shape().Clone()...), tensor.Of(in[0].Dtype()))
	return op.UsePreallocDo(out, vals...)
}

func (bernoulliGradOp) UsePreallocDo(prealloc G.Value, vals ...G.Value) (G.Value, error) {
	in, g, err := denseInputs("Bernoulli gradient", 3, vals...)
	if err != nil {
		return nil, err
	}
	out, ok := prealloc.(*tensor.Dense)
	if !ok || out.Size() != g.Size() {
		return nil, fmt.Errorf("losses: Bernoulli gradient: bad output buffer %T", prealloc)
	}
	switch o := out.Data().(type) {
	case []float64:
		bernoulliBackward(o, in[0].Data().([]float64), in[1].Data().([]float64), g.Data().([]float64), math.Exp)
	case []float32:
		bernoulliBackward(o, in[0].Data().([]float32), in[1].Data().([]float32), g.Data().([]float32), math32.Exp)
	default:
		return nil, fmt.Errorf("losses: Bernoulli gradient: dtype %v is not float32 or float64", out.Dtype())
	}
	return out, nil
}

func bernoulliBackward[T float32 | float64](out, x, l, g []T, exp func(T) T) {
	for i, li := range l {
		// sigmoid without overflow: 1/(1+e^-l) for l >= 0, e^l/(1+e^l)
		// otherwise; x - sigmoid(l) written as (x - 1) + sigmoid(-l) for
		// l >= 0 keeps precision where sigmoid(l) is close to 1.
		var d T
		if li >= 0 {
			e := exp(-li)
			d = (x[i] - 1) + e/(1+e)
		} else {
			e := exp(li)
			d = x[i] - e/(1+e)
		}
		out[i] = g[i] * d
	}
}

func (bernoulliGradOp) DiffWRT(inputs int) []bool { return make([]bool, inputs) }

func (bernoulliGradOp) SymDiff(G.Nodes, *G.Node, *G.Node) (G.Nodes, error) {
	return nil, fmt.Errorf("losses: Bernoulli gradient: no second derivative")
}

func (bernoulliGradOp) ReturnsPtr() bool      { return false }
func (bernoulliGradOp) CallsExtern() bool     { return false }
func (bernoulliGradOp) OverwritesInput() int  { return -1 }
func (bernoulliGradOp) WriteHash(h hash.Hash) { fmt.Fprint(h, "lowerbound.losses.bernoulli_grad") }
func (op bernoulliGradOp) Hashcode() uint32   { return opHash(op) }
func (bernoulliGradOp) String() string        { return "BernoulliLogProbGrad" }

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

// denseInputs checks arity, density, row-major layout and a common dtype
// and size; it returns the first arity-1 inputs and the last one.
func denseInputs(name string, arity int, vals ...G.Value) ([]*tensor.Dense, *tensor.Dense, error) {
	if len(vals) != arity {
		return nil, nil, fmt.Errorf("losses: %s: want %d inputs, have %d", name, arity, len(vals))
	}
	ds := make([]*tensor.Dense, arity)
	for i, v := range vals {
		d, ok := v.(*tensor.Dense)
		if !ok {
			return nil, nil, fmt.Errorf("losses: %s: input %d is a %T, want a dense tensor", name, i, v)
		}
		if d.IsView() {
			d = d.Materialize().(*tensor.Dense)
		}
		if i > 0 && (d.Dtype() != ds[0].Dtype() || d.Size() != ds[0].Size()) {
			return nil, nil, fmt.Errorf("losses: %s: input %d is %v of %d values, input 0 is %v of %d", name, i, d.Dtype(), d.Size(), ds[0].Dtype(), ds[0].Size())
		}
		ds[i] = d
	}
	return ds[:arity-1], ds[arity-1], nil
}
