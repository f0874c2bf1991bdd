// Package losses builds the terms of the variational objective as gorgonia
// graph nodes: closed-form KL divergences, observation log-likelihoods, the
// beta-weighted ELBO, a stable log-sum-exp and the importance-weighted
// bound. Every function adds nodes to the graph of its inputs, works in
// float32 and float64 (all inputs of one call share a dtype), and has
// working gradients for G.Grad.
//
// # Shapes: per dimension, per sample, batch total
//
// Functions named for a density or divergence return one value per element:
// shape (N, D) for N records of D latent dimensions (KLStandardNormal,
// KLDiagonal, DiagGaussianLogProb, StandardNormalLogProb) or (N, F) for F
// observed features (BernoulliLogProb, GaussianLogProb,
// GaussianLogProbLearned). Two reductions finish the job:
//
//	PerSample(perDim)   // sum over axis 1: (N, D) -> (N), one value per record
//	BatchTotal(x)       // sum of everything -> a scalar
//
// Keeping the per-dimension form lets callers apply free bits or inspect
// which latent dimensions are active before summing. A typical objective:
//
//	ll, _ := losses.PerSample(bernoulliLP)                // log p(x|z), (N)
//	kl, _ := losses.PerSample(klPerDim)                   // KL(q||p), (N)
//	elbo, _ := losses.ELBO(ll, kl, beta)                  // ll - beta*kl, (N)
//	total, _ := losses.BatchTotal(elbo)                   // scalar
//	loss, _ := G.Div(total, G.NewConstant(float64(-n)))   // minimise -mean ELBO
//
// beta is a scalar node, so a schedule can change it between steps with
// G.Let without rebuilding the graph.
//
// # The training objective
//
// Two batch-level pieces complete the objective the trainer in package vae
// minimises, -ELBO with the KL term floored and penalised:
//
//	FreeBits(klPerDim, lambda)          // sum_j max(lambda, kl_j), Kingma et al. 2016
//	CapacityPenalty(kl, target, gamma)  // gamma*|kl - C|, Burgess et al. 2018
//
// klPerDim is the batch mean of each dimension's KL (a (1, D) row or a (D)
// vector; a scalar is one group). The trainer builds its loss from ELBO,
// FreeBits and CapacityPenalty, so the functions tested here are the ones
// that train; vae/schedule holds their host-side forms (FreeBits.Objective,
// Capacity.Penalty) and the schedules that set lambda, beta and C.
//
// # Closed forms
//
// KLStandardNormal is KL(N(mu, exp(logVar)) || N(0, I)) per dimension,
// 0.5*(exp(logVar) + mu^2 - 1 - logVar) (Kingma and Welling 2014, appendix
// B). KLDiagonal is the general diagonal case, with the second Gaussian given
// per record or as one shared row.
//
// # Stable forms
//
// BernoulliLogProb computes x*l - softplus(l) with softplus(l) =
// max(l, 0) + log1p(exp(-|l|)): exact and finite for any finite logit, with
// gradient x - sigmoid(l) formed without cancellation (it stays accurate
// even where sigmoid(l) is 1e-35). gorgonia's Softplus op is not used (it
// returns l unchanged above 16).
//
// LogSumExp computes m + log(sum(exp(a - m))) with m the maximum along the
// axis, held constant for gradients (common practice; the gradient is still
// exact). Values near 1e3, where exp overflows, are fine. gorgonia's own
// LogSumExp (v0.9.18) is wrong and is not used.
//
// # Gaussian likelihood and squared error
//
// For one record of F features with fixed sigma,
//
//	log p(x | mean) = -(1/(2 sigma^2)) * sum_f (x_f - mean_f)^2 - F*log(sigma) - (F/2)*log(2 pi)
//
// so maximising it is least squares: with sigma = 1 the negative
// log-likelihood is 0.5*SSE + (F/2)*log(2 pi), SSE the record's sum of
// squared errors. GaussianLogProb includes the constant, so its values are
// true log-densities, comparable across models of the same data. Up to the
// constant and an overall factor, a fixed sigma weighs the squared error
// against the KL term exactly as beta = sigma^2 does with sigma = 1.
//
// # Likelihoods
//
// The Likelihood interface turns decoder output into log p(x | z) per record
// and into a reconstruction (Mean). Bernoulli (out = logits, mean =
// sigmoid), Gaussian{Sigma} (fixed sigma; zero value means 1; mean = out)
// and LearnedGaussian (one learned log sigma per feature, with a soft lower
// bound at MinLogSigma = log(1e-3), see its doc) implement it.
// DescribeLikelihood and LikelihoodFromSpec turn them into a small
// JSON-ready LikelihoodSpec and back, for checkpoints.
//
// # Importance-weighted bound
//
// With K samples z_k ~ q(z|x) and log weights log w_k = log p(x, z_k) -
// log q(z_k|x) (use DiagGaussianLogProb for log q and StandardNormalLogProb
// or a prior for log p(z)), ImportanceWeighted computes
//
//	L_K = log((1/K) * sum_k w_k)
//
// per record from a (K, N) matrix of log weights (row k = sample k; a
// per-sample vector in layers.Reparameterize's row order k*N + n reshapes to
// it directly). L_1 is the ELBO; E[L_K] never decreases with K and tends to
// log p(x) (Burda, Grosse and Salakhutdinov 2016), so L_K for K in the
// hundreds or thousands is the usual estimate of a model's log-likelihood.
//
// # Errors
//
// Bad arguments (nil nodes, mismatched shapes or dtypes, sigma <= 0, an
// axis other than 0 or 1) return an error naming the function and the
// argument and wrapping layers.ErrInvalidArgument; nothing panics on user
// input. An unknown likelihood kind wraps ErrUnknownLikelihood.
//
// # Reading values
//
// After a run, read intermediate results through G.Read: gorgonia's tape
// machine may reuse an intermediate node's memory for a later operation, so
// node.Value() is only reliable for the final outputs.
package losses
