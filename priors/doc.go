// Package priors holds the prior p(z) of a variational autoencoder: the
// Prior interface and the priors that ship with the SDK.
//
// # The interface
//
// A Prior has a latent size (Dim), adds log p(z) for a batch of latent
// vectors to a gorgonia graph (LogProb, one value per row), draws samples
// from a *rand.Rand (Sample) and lists its learnable parameters (Params).
// Parameters are *layers.Param values bound through a *layers.Scope, so
// the training graph and every inference graph share the same numbers.
// A prior that also implements ClosedFormKL gives the analytic KL
// divergence from the diagonal Gaussian posterior q(z|x), and training
// uses it.
//
// # Built-in priors
//
//	NewStandardNormal(dim, dtype)          N(0, I); no parameters; closed-form KL
//	NewDiagonal(name, dim, dtype)          N(m, diag(exp(v))); name.mean, name.logvar (1, D), start at 0; closed-form KL
//	NewMixture(name, K, dim, opt)          sum_k w_k N(mu_k, diag(exp(v_k))); name.logits (1, K),
//	                                       name.means (K, D), name.logvars (K, D)
//	NewVamp(name, K, inputShape, enc, head, opt)
//	                                       VampPrior (Tomczak and Welling 2018): (1/K) sum_k q(z | u_k)
//	                                       with learnable pseudo-inputs name.pseudo_inputs (K, F)
//
// The zero dtype is float32; float64 is supported throughout.
//
// Mixture weights are softmax(logits), taken as a stable log-softmax in the
// graph; the logits start at zero (equal weights), the log-variances at
// zero, and the means as independent N(0, Spread^2) draws from
// MixtureOptions.Seed (Spread defaults to DefaultSpread, 0.5) so that the
// components differ from the first step.
//
// The VampPrior runs the model's own encoder and Gaussian head on its
// pseudo-inputs. The encoder and head are given at construction and are
// not owned by the prior: Params returns only the pseudo-inputs, while the
// encoder's parameters are the model's (listed, trained and saved with the
// model). For a convolutional encoder give the per-record input shape, for
// example {1, 28, 28}; the pseudo-inputs are stored flat, (K, 784), and
// reshaped inside the graph. They start as uniform draws in [0, 1) from
// VampOptions.Seed, or as K distinct records of VampOptions.Data.
//
// # How mixture densities are computed
//
// For both mixtures, LogProb forms the N x K table of component
// log-densities with matrix products instead of a three-dimensional
// broadcast, from
//
//	sum_d (z_d - mu_kd)^2 / s_kd = (z∘z) @ (1/s)^T - 2 z @ (mu/s)^T + rowsum(mu^2/s)^T
//
// and then takes a stable log-sum-exp over the K components. The expansion
// loses precision when |z| and |mu| are much larger than the component
// scales (catastrophic cancellation); in practice that matters only in
// float32.
//
// Sample on a mixture draws, for each row, one uniform from rng to choose
// the component by its weight and then D standard normals. The VampPrior
// first runs the encoder on the pseudo-inputs in a small graph of its own
// (see Vamp.Posteriors).
//
// # KL without a closed form
//
// Mixture and Vamp do not implement ClosedFormKL. For them the trainer
// estimates the KL term by Monte Carlo with the reparameterised samples it
// already draws:
//
//	KL(q(z|x) || p(z)) ≈ (1/S) sum_s [log q(z_s|x) - log p(z_s)],  z_s ~ q(z|x)
//
// The estimate is unbiased, but its variance is higher than that of the
// closed form, and a single sample's term can be negative even though the
// divergence itself is not.
//
// # Checkpoints
//
// Describe returns a JSON-able Spec (kind, parameter-name prefix, sizes) of
// a built-in prior, and FromSpec rebuilds the prior with the same parameter
// names and shapes; the values are then read from the checkpoint by name.
// A VampPrior is rebuilt around the model's rebuilt encoder and head. An
// unknown kind gives an error wrapping ErrUnknownKind; bad arguments
// anywhere give errors wrapping layers.ErrInvalidArgument.
package priors
