package losses

import (
	"errors"
	"fmt"
	"math"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// Bernoulli is the likelihood for binary (or [0, 1]) data: the decoder
// output is one logit per feature and the mean is its sigmoid. See
// BernoulliLogProb.
type Bernoulli struct{}

// LogProb returns the log-likelihood of each record, shape (N).
func (Bernoulli) LogProb(s *layers.Scope, x, out *G.Node) (*G.Node, error) {
	// One fused op for the terms and their sum over features (see
	// bernoulli_op.go).
	lp, err := bernoulliPerSample(x, out, s.IsData(x))
	if err != nil {
		return nil, fmt.Errorf("losses.Bernoulli.LogProb: %w", err)
	}
	return lp, nil
}

// Mean returns sigmoid(out), the probability of a one.
func (Bernoulli) Mean(s *layers.Scope, out *G.Node) (*G.Node, error) {
	if err := checkMatrix("losses.Bernoulli.Mean", "out", out); err != nil {
		return nil, err
	}
	return G.Sigmoid(out)
}

// Params returns nil: the Bernoulli likelihood has no parameters.
func (Bernoulli) Params() []*layers.Param { return nil }

// Gaussian is the likelihood for real data with a fixed standard deviation:
// the decoder output is the mean. The zero value has Sigma 0, which means
// 1 (unit variance); a negative or non-finite Sigma is an error at LogProb.
// See GaussianLogProb for how the result relates to the squared error.
type Gaussian struct{ Sigma float64 }

// sigma returns the effective standard deviation.
func (g Gaussian) sigma() float64 {
	if g.Sigma == 0 {
		return 1
	}
	return g.Sigma
}

// LogProb returns the log-likelihood of each record, shape (N).
func (g Gaussian) LogProb(s *layers.Scope, x, out *G.Node) (*G.Node, error) {
	lp, err := GaussianLogProb(x, out, g.sigma())
	if err != nil {
		return nil, fmt.Errorf("losses.Gaussian.LogProb: %w", err)
	}
	return PerSample(lp)
}

// Mean returns out: the decoder output is the mean.
func (Gaussian) Mean(s *layers.Scope, out *G.Node) (*G.Node, error) {
	if err := checkMatrix("losses.Gaussian.Mean", "out", out); err != nil {
		return nil, err
	}
	return out, nil
}

// Params returns nil: sigma is fixed.
func (Gaussian) Params() []*layers.Param { return nil }

// MinLogSigma is the soft lower bound that LearnedGaussian puts on its log
// standard deviation: log(1e-3). See LearnedGaussian.
const MinLogSigma = -6.907755278982137

// LearnedGaussian is the Gaussian likelihood with one learned standard
// deviation per feature, shared by all records; the decoder output is the
// mean. Its one parameter, named "<name>.log_sigma", has shape (1, F) and
// starts at 0.
//
// Safeguard: a feature that the decoder can predict almost exactly (a
// constant pixel at the edge of an image, say) drives its maximum-likelihood
// sigma to 0 and the log-likelihood to +Inf. To prevent that, the log sigma
// actually used is a soft lower bound of the parameter r:
//
//	log sigma = MinLogSigma + softplus(r - MinLogSigma)
//
// which never drops below MinLogSigma (sigma >= 1e-3), equals r to within
// exp(-(r - MinLogSigma)) when r is well above the bound (within 1e-3 at the
// start, r = 0, so sigma starts at 1.001), and, unlike a hard clamp, never
// stops the gradient. Data on a much smaller scale than 1e-3 should be
// rescaled.
type LearnedGaussian struct {
	logSigma *layers.Param
	features int
	name     string
}

// NewLearnedGaussian returns a LearnedGaussian for features features whose
// parameter is named name + ".log_sigma", in dtype (float32 or float64).
func NewLearnedGaussian(name string, features int, dtype tensor.Dtype) (*LearnedGaussian, error) {
	const where = "losses.NewLearnedGaussian"
	if name == "" {
		return nil, argError(where, "name", "empty")
	}
	if features < 1 {
		return nil, argError(where, "features", "want at least 1, have %d", features)
	}
	if dtype != tensor.Float32 && dtype != tensor.Float64 {
		return nil, argError(where, "dtype", "%v is not float32 or float64", dtype)
	}
	v := tensor.New(tensor.Of(dtype), tensor.WithShape(1, features))
	return &LearnedGaussian{
		logSigma: &layers.Param{Name: name + ".log_sigma", Value: v},
		features: features,
		name:     name,
	}, nil
}

// LogSigma returns the node of the bounded log standard deviation, shape
// (1, F), bound into s.
func (l *LearnedGaussian) LogSigma(s *layers.Scope) (*G.Node, error) {
	const where = "losses.LearnedGaussian.LogSigma"
	if l == nil || l.logSigma == nil {
		return nil, argError(where, "l", "not made by NewLearnedGaussian")
	}
	if s == nil {
		return nil, argError(where, "s", "nil scope")
	}
	return boundedLogSigma(where, s.Bind(l.logSigma))
}

// boundedLogSigma maps the raw parameter node r to the log standard
// deviation MinLogSigma + softplus(r - MinLogSigma): smooth, increasing,
// never below MinLogSigma, and close to r well above it. It is the one
// implementation of the floor for every learned-sigma likelihood (the
// checkpoint format records it as the "softplus_floor" transform).
func boundedLogSigma(where string, r *G.Node) (*G.Node, error) {
	shifted, err := G.Sub(r, scalar(r, MinLogSigma))
	if err != nil {
		return nil, opError(where, "shift", err)
	}
	sp, err := softplus(shifted)
	if err != nil {
		return nil, opError(where, "softplus", err)
	}
	out, err := G.Add(sp, scalar(r, MinLogSigma))
	if err != nil {
		return nil, opError(where, "shift", err)
	}
	return out, nil
}

// LogProb returns the log-likelihood of each record, shape (N).
func (l *LearnedGaussian) LogProb(s *layers.Scope, x, out *G.Node) (*G.Node, error) {
	const where = "losses.LearnedGaussian.LogProb"
	if err := checkMatrix(where, "x", x); err != nil {
		return nil, err
	}
	if l != nil && x.Shape()[1] != l.features {
		return nil, argError(where, "x", "has %d features, the likelihood %d", x.Shape()[1], l.features)
	}
	if l != nil && l.logSigma != nil && x.Dtype() != l.logSigma.Value.Dtype() {
		return nil, argError(where, "x", "dtype %v differs from the likelihood's %v", x.Dtype(), l.logSigma.Value.Dtype())
	}
	ls, err := l.LogSigma(s)
	if err != nil {
		return nil, err
	}
	lp, err := GaussianLogProbLearned(x, out, ls)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return PerSample(lp)
}

// Mean returns out: the decoder output is the mean.
func (l *LearnedGaussian) Mean(s *layers.Scope, out *G.Node) (*G.Node, error) {
	if err := checkMatrix("losses.LearnedGaussian.Mean", "out", out); err != nil {
		return nil, err
	}
	return out, nil
}

// Params returns the log sigma parameter.
func (l *LearnedGaussian) Params() []*layers.Param {
	if l == nil || l.logSigma == nil {
		return nil
	}
	return []*layers.Param{l.logSigma}
}

// ErrUnknownLikelihood is wrapped by LikelihoodFromSpec when the spec's
// Kind names no likelihood of this package.
var ErrUnknownLikelihood = errors.New("unknown likelihood")

// Kinds of LikelihoodSpec.
const (
	KindBernoulli       = "bernoulli"
	KindGaussian        = "gaussian"
	KindLearnedGaussian = "learned_gaussian"
	KindColumns         = "columns"
)

// LikelihoodSpec describes a likelihood of this package so that a
// checkpoint can rebuild it: Kind is one of the Kind constants; Sigma is
// the fixed standard deviation of a Gaussian; Features and Name are the
// arguments of NewLearnedGaussian (its parameter values are stored with the
// other parameters, under Name + ".log_sigma"). For KindColumns, Columns
// lists the columns, Features is their number and Name the prefix given to
// NewColumns (its log sigma parameter, if any, is stored the same way).
type LikelihoodSpec struct {
	Kind     string   `json:"kind"`
	Sigma    float64  `json:"sigma,omitempty"`
	Features int      `json:"features,omitempty"`
	Name     string   `json:"name,omitempty"`
	Columns  []Column `json:"columns,omitempty"`
}

// DescribeLikelihood returns the spec of a likelihood of this package, or
// false for any other implementation.
func DescribeLikelihood(l Likelihood) (LikelihoodSpec, bool) {
	switch v := l.(type) {
	case Bernoulli, *Bernoulli:
		return LikelihoodSpec{Kind: KindBernoulli}, true
	case Gaussian:
		return LikelihoodSpec{Kind: KindGaussian, Sigma: v.sigma()}, true
	case *Gaussian:
		if v == nil {
			return LikelihoodSpec{}, false
		}
		return LikelihoodSpec{Kind: KindGaussian, Sigma: v.sigma()}, true
	case *LearnedGaussian:
		if v == nil || v.logSigma == nil {
			return LikelihoodSpec{}, false
		}
		return LikelihoodSpec{Kind: KindLearnedGaussian, Features: v.features, Name: v.name}, true
	case *Columns:
		if v == nil || v.cols == nil {
			return LikelihoodSpec{}, false
		}
		return LikelihoodSpec{Kind: KindColumns, Features: len(v.cols), Name: v.name, Columns: v.Schema()}, true
	}
	return LikelihoodSpec{}, false
}

// LikelihoodFromSpec builds the likelihood that spec describes, in dtype.
// A learned Gaussian comes back with log sigma 0; load the stored parameter
// into it afterwards. An unknown Kind gives an error wrapping
// ErrUnknownLikelihood; a bad field, one wrapping layers.ErrInvalidArgument.
func LikelihoodFromSpec(spec LikelihoodSpec, dtype tensor.Dtype) (Likelihood, error) {
	const where = "losses.LikelihoodFromSpec"
	if dtype != tensor.Float32 && dtype != tensor.Float64 {
		return nil, argError(where, "dtype", "%v is not float32 or float64", dtype)
	}
	switch spec.Kind {
	case KindBernoulli:
		return Bernoulli{}, nil
	case KindGaussian:
		if !(spec.Sigma > 0) || math.IsInf(spec.Sigma, 0) {
			return nil, argError(where, "spec.Sigma", "want a finite value > 0, have %v", spec.Sigma)
		}
		return Gaussian{Sigma: spec.Sigma}, nil
	case KindLearnedGaussian:
		l, err := NewLearnedGaussian(spec.Name, spec.Features, dtype)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", where, err)
		}
		return l, nil
	case KindColumns:
		if spec.Features != len(spec.Columns) {
			return nil, argError(where, "spec.Features", "%d, and %d columns are listed", spec.Features, len(spec.Columns))
		}
		l, err := NewColumns(spec.Name, spec.Columns, dtype)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", where, err)
		}
		return l, nil
	}
	return nil, fmt.Errorf("%s: spec.Kind %q: %w", where, spec.Kind, ErrUnknownLikelihood)
}
