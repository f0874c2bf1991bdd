package losses

import (
	G "gorgonia.org/gorgonia"
)

// This file holds the batch-level pieces of the training objective that
// sit on top of the ELBO: the free-bits floor and the KL capacity penalty.
// The trainer in package vae builds its loss from ELBO, FreeBits and
// CapacityPenalty and from nothing else, so what is tested here is what
// trains. Their host-side counterparts (plain float64 functions of a step)
// are schedule.FreeBits.Objective and schedule.Capacity.Penalty.

// FreeBits returns the free-bits KL term of Kingma et al. 2016 ("Improved
// Variational Inference with Inverse Autoregressive Flow", appendix, the
// paragraph on free bits):
//
//	sum_j max(lambda, kl[j])
//
// kl holds the KL of each group of latent variables averaged over the
// minibatch (not summed over it): a vector (D), a row (1, D), or a scalar
// for a single group (the total KL, when the divergence does not split by
// dimension). lambda is a scalar node in nats per group, so a schedule can
// change it between runs (G.Let) without rebuilding the graph. The result
// is a scalar.
//
// A group below lambda costs the constant lambda and gets no gradient: the
// gradient with respect to kl[j] is exactly 1 where kl[j] > lambda and
// exactly 0 where kl[j] < lambda (1/2 at a tie). max(a, b) is formed as
// (a + b + |a - b|)/2, which gorgonia differentiates at every point (its
// MaxBetween fails on scalars); the value is max(a, b) to within a few
// units in the last place.
func FreeBits(kl, lambda *G.Node) (*G.Node, error) {
	const where = "losses.FreeBits"
	if kl == nil {
		return nil, argError(where, "kl", "nil node")
	}
	if lambda == nil {
		return nil, argError(where, "lambda", "nil node")
	}
	if err := checkFloat(where, "kl", kl); err != nil {
		return nil, err
	}
	ks := kl.Shape()
	switch {
	case kl.IsScalar():
	case ks.Dims() == 1 && ks[0] >= 1:
	case ks.Dims() == 2 && ks[0] == 1 && ks[1] >= 1:
	default:
		return nil, argError(where, "kl", "want a vector (D), a row (1, D) or a scalar, have shape %v", ks)
	}
	if !lambda.IsScalar() {
		return nil, argError(where, "lambda", "want a scalar node, have shape %v", lambda.Shape())
	}
	if lambda.Dtype() != kl.Dtype() {
		return nil, argError(where, "lambda", "dtype %v differs from kl's %v", lambda.Dtype(), kl.Dtype())
	}
	sum, err := G.Add(kl, lambda)
	if err != nil {
		return nil, opError(where, "kl + lambda", err)
	}
	gap, err := G.Sub(kl, lambda)
	if err != nil {
		return nil, opError(where, "kl - lambda", err)
	}
	if gap, err = G.Abs(gap); err != nil {
		return nil, opError(where, "|kl - lambda|", err)
	}
	floored, err := G.Add(sum, gap)
	if err != nil {
		return nil, opError(where, "max", err)
	}
	if floored, err = G.Mul(floored, scalar(kl, 0.5)); err != nil {
		return nil, opError(where, "max", err)
	}
	if floored.IsScalar() {
		return floored, nil
	}
	out, err := G.Sum(floored)
	if err != nil {
		return nil, opError(where, "sum", err)
	}
	return out, nil
}

// CapacityPenalty returns the KL capacity penalty of Burgess et al. 2018
// ("Understanding disentangling in beta-VAE", section 5),
//
//	gamma * |kl - target|
//
// for scalar nodes: kl the KL per record (summed over latent dimensions,
// averaged over the minibatch), target the capacity C at this step (see
// schedule.Capacity.Target) and gamma its weight. Add it to the negative
// ELBO (or subtract it from the ELBO). Keeping target and gamma nodes lets
// the capacity grow between runs without rebuilding the graph.
func CapacityPenalty(kl, target, gamma *G.Node) (*G.Node, error) {
	const where = "losses.CapacityPenalty"
	for _, a := range []struct {
		name string
		n    *G.Node
	}{{"kl", kl}, {"target", target}, {"gamma", gamma}} {
		if a.n == nil {
			return nil, argError(where, a.name, "nil node")
		}
		if !a.n.IsScalar() {
			return nil, argError(where, a.name, "want a scalar node, have shape %v", a.n.Shape())
		}
		if err := checkFloat(where, a.name, a.n); err != nil {
			return nil, err
		}
		if a.n.Dtype() != kl.Dtype() {
			return nil, argError(where, a.name, "dtype %v differs from kl's %v", a.n.Dtype(), kl.Dtype())
		}
	}
	gap, err := G.Sub(kl, target)
	if err != nil {
		return nil, opError(where, "kl - target", err)
	}
	if gap, err = G.Abs(gap); err != nil {
		return nil, opError(where, "|kl - target|", err)
	}
	out, err := G.Mul(gap, gamma)
	if err != nil {
		return nil, opError(where, "gamma*|kl - target|", err)
	}
	return out, nil
}
