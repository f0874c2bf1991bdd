package priors

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// ErrUnknownKind is wrapped by FromSpec when a Spec names a kind of prior
// that this package does not build.
var ErrUnknownKind = errors.New("unknown prior kind")

const log2Pi = 1.8378770664093453 // log(2*pi)

// argError returns an error wrapping layers.ErrInvalidArgument that names
// the function and the argument.
func argError(where, arg, format string, a ...any) error {
	return fmt.Errorf("%s: %s: %s: %w", where, arg, fmt.Sprintf(format, a...), layers.ErrInvalidArgument)
}

// checkDtype maps the zero Dtype to float32 and rejects anything that is
// not float32 or float64.
func checkDtype(where string, dt tensor.Dtype) (tensor.Dtype, error) {
	if dt.Type == nil {
		return tensor.Float32, nil
	}
	if dt != tensor.Float32 && dt != tensor.Float64 {
		return dt, argError(where, "dtype", "%v is not float32 or float64", dt)
	}
	return dt, nil
}

// newParam returns a parameter of the given shape filled with vals (float64
// values converted to dt); vals nil means zeros.
func newParam(name string, dt tensor.Dtype, vals []float64, shape ...int) *layers.Param {
	n := 1
	for _, s := range shape {
		n *= s
	}
	var backing any
	if dt == tensor.Float64 {
		b := make([]float64, n)
		copy(b, vals)
		backing = b
	} else {
		b := make([]float32, n)
		for i, v := range vals {
			b[i] = float32(v)
		}
		backing = b
	}
	return &layers.Param{Name: name, Value: tensor.New(tensor.WithShape(shape...), tensor.WithBacking(backing))}
}

// values copies the numbers of a float32 or float64 tensor into a new
// []float64 (row-major).
func values(t *tensor.Dense) ([]float64, error) {
	if t == nil {
		return nil, argError("priors", "tensor", "nil")
	}
	switch d := t.Data().(type) {
	case []float64:
		return append([]float64(nil), d...), nil
	case []float32:
		out := make([]float64, len(d))
		for i, v := range d {
			out[i] = float64(v)
		}
		return out, nil
	case float64:
		return []float64{d}, nil
	case float32:
		return []float64{float64(d)}, nil
	default:
		return nil, argError("priors", "tensor", "dtype %v is not float32 or float64", t.Dtype())
	}
}

// denseOf returns an (r, c) tensor of dtype dt holding vals.
func denseOf(dt tensor.Dtype, vals []float64, r, c int) *tensor.Dense {
	if dt == tensor.Float64 {
		return tensor.New(tensor.WithShape(r, c), tensor.WithBacking(vals))
	}
	b := make([]float32, len(vals))
	for i, v := range vals {
		b[i] = float32(v)
	}
	return tensor.New(tensor.WithShape(r, c), tensor.WithBacking(b))
}

// scalar returns a scalar constant of v in the dtype of n.
func scalar(n *G.Node, v float64) *G.Node {
	if n.Dtype() == tensor.Float32 {
		return G.NewConstant(float32(v))
	}
	return G.NewConstant(v)
}

// checkZ validates a batch of latent vectors for a prior of width d.
func checkZ(where string, s *layers.Scope, z *G.Node, d int, dt tensor.Dtype) error {
	if s == nil {
		return argError(where, "s", "nil scope")
	}
	if z == nil {
		return argError(where, "z", "nil node")
	}
	sh := z.Shape()
	if sh.Dims() != 2 || sh[0] < 1 || sh[1] != d {
		return argError(where, "z", "want shape (N, %d), have %v", d, sh)
	}
	if z.Dtype() != dt {
		return argError(where, "z", "dtype %v, prior has %v", z.Dtype(), dt)
	}
	return nil
}

// checkSample validates the arguments of Sample.
func checkSample(where string, rng *rand.Rand, n int) error {
	if rng == nil {
		return argError(where, "rng", "nil")
	}
	if n < 1 {
		return argError(where, "n", "want >= 1, have %d", n)
	}
	return nil
}

// logSoftmax returns the stable log-softmax of a vector of logits.
func logSoftmax(logits []float64) []float64 {
	m := math.Inf(-1)
	for _, v := range logits {
		m = math.Max(m, v)
	}
	var sum float64
	for _, v := range logits {
		sum += math.Exp(v - m)
	}
	lse := m + math.Log(sum)
	out := make([]float64, len(logits))
	for i, v := range logits {
		out[i] = v - lse
	}
	return out
}

// pick draws a component index from probabilities w (summing to one) with
// one uniform draw.
func pick(rng *rand.Rand, w []float64) int {
	u := rng.Float64()
	var c float64
	for k, p := range w {
		c += p
		if u < c {
			return k
		}
	}
	return len(w) - 1
}

// sampleMixture draws n rows from the mixture with weights w, means mu and
// log-variances lv (each K*D, row-major). For every row it draws the
// component first, then D standard normals, in that order.
func sampleMixture(rng *rand.Rand, n, d int, w, mu, lv []float64, dt tensor.Dtype) *tensor.Dense {
	out := make([]float64, n*d)
	for i := 0; i < n; i++ {
		k := pick(rng, w)
		for j := 0; j < d; j++ {
			out[i*d+j] = mu[k*d+j] + math.Exp(0.5*lv[k*d+j])*rng.NormFloat64()
		}
	}
	return denseOf(dt, out, n, d)
}

// checkKL validates the arguments of a closed-form KL: mu as checkZ checks
// z, and logVar of mu's shape.
func checkKL(where string, s *layers.Scope, mu, logVar *G.Node, d int, dt tensor.Dtype) error {
	if err := checkZ(where, s, mu, d, dt); err != nil {
		return err
	}
	if logVar == nil || !logVar.Shape().Eq(mu.Shape()) {
		return argError(where, "logVar", "want the shape of mu %v", mu.Shape())
	}
	return nil
}

// sumDims turns a per-dimension log-density (N, D) into one value per row.
func sumDims(where string, perDim *G.Node, err error) (*G.Node, error) {
	if err == nil {
		perDim, err = losses.PerSample(perDim)
	}
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return perDim, nil
}
