package losses

import (
	"math"

	G "gorgonia.org/gorgonia"
)

// log2Pi is log(2 pi).
const log2Pi = 1.83787706640934548356065947281123527972279494727556682563430308

// BernoulliLogProb returns log p(x | logits) elementwise for Bernoulli
// observations with success probability sigmoid(logits):
//
//	x*l - softplus(l),   softplus(l) = max(l, 0) + log1p(exp(-|l|))
//
// x and logits have shape (N, F); so has the result. The stable softplus
// keeps the value exact and finite for any finite logit (+-1e4 included) and
// its gradient, x - sigmoid(l), finite. gorgonia's own Softplus op is not
// used: it returns l unchanged above 16, which is off by up to 1e-7. The
// value and its gradient each run as one fused elementwise op.
//
// x is normally 0 or 1; values in [0, 1] (grey levels) give the usual
// continuous cross-entropy, which is not a normalised density.
func BernoulliLogProb(x, logits *G.Node) (*G.Node, error) {
	const where = "losses.BernoulliLogProb"
	if err := checkMatrix(where, "x", x); err != nil {
		return nil, err
	}
	if err := checkSame(where, "logits", logits, "x", x); err != nil {
		return nil, err
	}
	out, err := G.ApplyOp(&bernoulliOp{}, x, logits)
	if err != nil {
		return nil, opError(where, "Bernoulli", err)
	}
	return out, nil
}

// GaussianLogProb returns log N(x; mean, sigma^2) elementwise for a fixed
// standard deviation sigma > 0. x and mean have shape (N, F); so has the
// result. Summed over the F features of a record it is
//
//	log p(x | mean) = -(1/(2 sigma^2)) * sum_f (x_f - mean_f)^2 - F*log(sigma) - (F/2)*log(2 pi)
//
// so the Gaussian likelihood is a scaled squared error plus a constant. With
// sigma = 1 the negative log-likelihood of a record is
// 0.5*SSE + (F/2)*log(2 pi), SSE being its sum of squared errors; the
// constant is included here, so reported values are true log-densities
// (comparable across models), not bare MSE.
func GaussianLogProb(x, mean *G.Node, sigma float64) (*G.Node, error) {
	const where = "losses.GaussianLogProb"
	if err := checkMatrix(where, "x", x); err != nil {
		return nil, err
	}
	if err := checkSame(where, "mean", mean, "x", x); err != nil {
		return nil, err
	}
	if !(sigma > 0) || math.IsInf(sigma, 0) {
		return nil, argError(where, "sigma", "want a finite value > 0, have %v", sigma)
	}
	d, err := G.Sub(x, mean)
	if err != nil {
		return nil, opError(where, "x - mean", err)
	}
	sq, err := G.Square(d)
	if err != nil {
		return nil, opError(where, "square", err)
	}
	scaled, err := G.Mul(sq, scalar(x, -0.5/(sigma*sigma)))
	if err != nil {
		return nil, opError(where, "scale", err)
	}
	out, err := G.Add(scaled, scalar(x, -math.Log(sigma)-0.5*log2Pi))
	if err != nil {
		return nil, opError(where, "constant", err)
	}
	return out, nil
}

// GaussianLogProbLearned returns log N(x; mean, exp(logSigma)^2)
// elementwise, with a learned log standard deviation per feature:
//
//	-0.5 * (x - mean)^2 * exp(-2*logSigma) - logSigma - 0.5*log(2 pi)
//
// x and mean have shape (N, F); logSigma has shape (1, F), shared by all
// records, or (N, F). The result has shape (N, F). logSigma is used as
// given; LearnedGaussian adds a lower bound on top.
func GaussianLogProbLearned(x, mean, logSigma *G.Node) (*G.Node, error) {
	const where = "losses.GaussianLogProbLearned"
	if err := checkMatrix(where, "x", x); err != nil {
		return nil, err
	}
	if err := checkSame(where, "mean", mean, "x", x); err != nil {
		return nil, err
	}
	if err := checkRows(where, "logSigma", logSigma, "x", x); err != nil {
		return nil, err
	}
	// log N(x; mean, sigma^2) with log sigma^2 = 2*logSigma.
	logVar, err := G.Mul(logSigma, scalar(x, 2))
	if err != nil {
		return nil, opError(where, "2*logSigma", err)
	}
	return diagGaussian(where, x, mean, logVar)
}

// DiagGaussianLogProb returns the log-density of a diagonal Gaussian per
// dimension, log N(z_d; mu_d, exp(logVar_d)):
//
//	-0.5 * (log(2 pi) + logVar + (z - mu)^2 * exp(-logVar))
//
// z has shape (N, D); mu and logVar each have shape (N, D) or (1, D). The
// result has shape (N, D). With PerSample it gives log q(z | x) for the
// Monte Carlo ELBO and the importance weights.
func DiagGaussianLogProb(z, mu, logVar *G.Node) (*G.Node, error) {
	const where = "losses.DiagGaussianLogProb"
	if err := checkMatrix(where, "z", z); err != nil {
		return nil, err
	}
	if err := checkRows(where, "mu", mu, "z", z); err != nil {
		return nil, err
	}
	if err := checkRows(where, "logVar", logVar, "z", z); err != nil {
		return nil, err
	}
	return diagGaussian(where, z, mu, logVar)
}

// diagGaussian builds -0.5*(log(2 pi) + logVar + (z - mu)^2 * exp(-logVar))
// for shapes the caller has checked: z (N, D), mu and logVar (N, D) or
// (1, D).
func diagGaussian(where string, z, mu, logVar *G.Node) (*G.Node, error) {
	d, err := rowSub(z, mu)
	if err != nil {
		return nil, opError(where, "z - mu", err)
	}
	sq, err := G.Square(d)
	if err != nil {
		return nil, opError(where, "square", err)
	}
	negLV, err := G.Neg(logVar)
	if err != nil {
		return nil, opError(where, "-logVar", err)
	}
	prec, err := G.Exp(negLV)
	if err != nil {
		return nil, opError(where, "precision", err)
	}
	q, err := rowMul(sq, prec)
	if err != nil {
		return nil, opError(where, "scaled square", err)
	}
	if q, err = rowAdd(q, logVar); err != nil {
		return nil, opError(where, "log variance", err)
	}
	if q, err = G.Add(q, scalar(z, log2Pi)); err != nil {
		return nil, opError(where, "constant", err)
	}
	if q, err = G.Mul(q, scalar(z, -0.5)); err != nil {
		return nil, opError(where, "scale", err)
	}
	return q, nil
}

// StandardNormalLogProb returns log N(z_d; 0, 1) = -0.5*(z^2 + log(2 pi))
// per dimension; z and the result have shape (N, D).
func StandardNormalLogProb(z *G.Node) (*G.Node, error) {
	const where = "losses.StandardNormalLogProb"
	if err := checkMatrix(where, "z", z); err != nil {
		return nil, err
	}
	sq, err := G.Square(z)
	if err != nil {
		return nil, opError(where, "square", err)
	}
	q, err := G.Add(sq, scalar(z, log2Pi))
	if err != nil {
		return nil, opError(where, "constant", err)
	}
	if q, err = G.Mul(q, scalar(z, -0.5)); err != nil {
		return nil, opError(where, "scale", err)
	}
	return q, nil
}
