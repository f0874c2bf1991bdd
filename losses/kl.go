package losses

import (
	G "gorgonia.org/gorgonia"
)

// KLStandardNormal returns the closed-form divergence
// KL(N(mu, exp(logVar)) || N(0, I)) per latent dimension:
//
//	0.5 * (exp(logVar) + mu^2 - 1 - logVar)
//
// (Kingma and Welling 2014, appendix B). mu and logVar have shape (N, D);
// so has the result. Sum it with PerSample and BatchTotal.
func KLStandardNormal(mu, logVar *G.Node) (*G.Node, error) {
	const where = "losses.KLStandardNormal"
	if err := checkMatrix(where, "mu", mu); err != nil {
		return nil, err
	}
	if err := checkSame(where, "logVar", logVar, "mu", mu); err != nil {
		return nil, err
	}
	v, err := G.Exp(logVar)
	if err != nil {
		return nil, opError(where, "exp(logVar)", err)
	}
	mu2, err := G.Square(mu)
	if err != nil {
		return nil, opError(where, "mu^2", err)
	}
	t, err := G.Add(v, mu2)
	if err != nil {
		return nil, opError(where, "sum", err)
	}
	if t, err = G.Sub(t, logVar); err != nil {
		return nil, opError(where, "sum", err)
	}
	if t, err = G.Sub(t, scalar(mu, 1)); err != nil {
		return nil, opError(where, "sum", err)
	}
	if t, err = G.Mul(t, scalar(mu, 0.5)); err != nil {
		return nil, opError(where, "scale", err)
	}
	return t, nil
}

// KLDiagonal returns KL(N(mu1, exp(logVar1)) || N(mu2, exp(logVar2))) per
// dimension for diagonal Gaussians:
//
//	0.5 * (logVar2 - logVar1 + exp(logVar1 - logVar2) + (mu1 - mu2)^2 * exp(-logVar2) - 1)
//
// mu1 and logVar1 have shape (N, D). mu2 and logVar2 each have shape (N, D)
// or (1, D); a single row is shared by all N rows (a learned prior, say).
// The result has shape (N, D).
func KLDiagonal(mu1, logVar1, mu2, logVar2 *G.Node) (*G.Node, error) {
	const where = "losses.KLDiagonal"
	if err := checkMatrix(where, "mu1", mu1); err != nil {
		return nil, err
	}
	if err := checkSame(where, "logVar1", logVar1, "mu1", mu1); err != nil {
		return nil, err
	}
	if err := checkRows(where, "mu2", mu2, "mu1", mu1); err != nil {
		return nil, err
	}
	if err := checkRows(where, "logVar2", logVar2, "mu1", mu1); err != nil {
		return nil, err
	}
	dlv, err := rowSub(logVar1, logVar2) // (N, D)
	if err != nil {
		return nil, opError(where, "logVar1 - logVar2", err)
	}
	ratio, err := G.Exp(dlv)
	if err != nil {
		return nil, opError(where, "variance ratio", err)
	}
	dmu, err := rowSub(mu1, mu2)
	if err != nil {
		return nil, opError(where, "mu1 - mu2", err)
	}
	dmu2, err := G.Square(dmu)
	if err != nil {
		return nil, opError(where, "(mu1 - mu2)^2", err)
	}
	negLV2, err := G.Neg(logVar2)
	if err != nil {
		return nil, opError(where, "-logVar2", err)
	}
	prec2, err := G.Exp(negLV2)
	if err != nil {
		return nil, opError(where, "exp(-logVar2)", err)
	}
	maha, err := rowMul(dmu2, prec2)
	if err != nil {
		return nil, opError(where, "scaled distance", err)
	}
	// ratio - dlv - 1 + maha, all (N, D).
	t, err := G.Sub(ratio, dlv)
	if err != nil {
		return nil, opError(where, "sum", err)
	}
	if t, err = G.Add(t, maha); err != nil {
		return nil, opError(where, "sum", err)
	}
	if t, err = G.Sub(t, scalar(mu1, 1)); err != nil {
		return nil, opError(where, "sum", err)
	}
	if t, err = G.Mul(t, scalar(mu1, 0.5)); err != nil {
		return nil, opError(where, "scale", err)
	}
	return t, nil
}

// PerSample sums a per-dimension term of shape (N, D) over its dimensions,
// giving one value per record: a vector of shape (N).
func PerSample(perDim *G.Node) (*G.Node, error) {
	const where = "losses.PerSample"
	if err := checkMatrix(where, "perDim", perDim); err != nil {
		return nil, err
	}
	s, err := G.Sum(perDim, 1)
	if err != nil {
		return nil, opError(where, "sum", err)
	}
	return s, nil
}

// BatchTotal sums every element of x (a matrix, a vector or a scalar) into
// a scalar: the batch total of a per-sample or per-dimension term. Divide
// by N for a batch mean.
func BatchTotal(x *G.Node) (*G.Node, error) {
	const where = "losses.BatchTotal"
	if x == nil {
		return nil, argError(where, "x", "nil node")
	}
	if err := checkFloat(where, "x", x); err != nil {
		return nil, err
	}
	if x.IsScalar() {
		return x, nil
	}
	if x.Shape().TotalSize() < 1 {
		return nil, argError(where, "x", "empty shape %v", x.Shape())
	}
	s, err := G.Sum(x)
	if err != nil {
		return nil, opError(where, "sum", err)
	}
	return s, nil
}
