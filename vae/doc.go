// Package vae composes layers, a likelihood and a prior into a variational
// autoencoder, and trains, evaluates, checkpoints and serves it.
//
// # Building a model
//
// NewMLP builds a fully connected model from a few numbers; New assembles
// one from parts: an encoder (any layers.Layer producing (N, H) features),
// a layers.GaussianHead, a decoder, a losses.Likelihood (Bernoulli by
// default; Gaussian with fixed or learned sigma) and a priors.Prior (the
// standard normal by default; any Prior, including your own). Config
// explains each field. Records arrive flat, F values each; image models set
// InputShape to {C, H, W} and receive (N, C, H, W) batches in the encoder.
//
// # Conditional models
//
// Config.Classes > 0 makes a conditional VAE (Sohn, Lee and Yan 2015) on
// a class label: the one-hot label is concatenated to the encoder input
// (as constant label planes for image inputs) and to z before the decoder.
// Data then carries labels (dataset.Set.WithLabels) and Decode, Generate
// take one label per row.
//
// # Training
//
// Train runs minibatch training with Adam or SGD. A model built from dense
// layers (Dense, MLP, Sequential of those and activations), the Gaussian
// head, the standard normal prior and any built-in likelihood (Bernoulli,
// Gaussian with a fixed or learned sigma, or a losses.Columns over mixed
// records with missing entries), with or without class labels, trains on
// the lean training path: each step runs on plain slices with buffers
// allocated once per Train call (no allocation in a steady-state step),
// the forward pass with the lean inference plan's formulas and the
// backward pass written out, checked against the graph path (gorgonia's
// symbolic differentiation) and against finite differences. A batch of 64
// or more records runs as two halves on two goroutines when GOMAXPROCS
// allows, the gradients summed in a fixed order, so a run gives the same
// bits on any number of cores. Any other model (convolutions, priors other
// than the standard normal, user-written parts) trains on one gorgonia
// graph, built for the configured batch size and reused for every step:
// the inputs are tensors the trainer refills, and a ragged last batch is
// padded and masked. Model.LeanPaths says which path a model takes, and
// why. Both paths minimise the same objective per record:
//
//	-E_q[log p(x|z)] + beta(step) * KL(q(z|x) || p(z))
//
// estimated with one reparameterised sample. The KL is the prior's closed
// form when it offers one (priors.ClosedFormKL) and otherwise the Monte
// Carlo estimate log q(z|x) - log p(z) at the same sample: unbiased, but
// noisier, and negative for some records. Free bits (Kingma et al. 2016)
// floor each dimension's batch-mean KL; the KL capacity objective (Burgess
// et al. 2018) adds gamma*|KL - C(step)|; schedules for beta live in
// vae/schedule. The loss is built from losses.ELBO, losses.FreeBits and
// losses.CapacityPenalty, the same public functions a custom trainer uses.
// Training takes a context, reports every step and epoch through
// callbacks, can validate, stop early and restore the best parameters, and
// stops with ErrNonFinite, naming the step and the term, as soon as a loss
// term is NaN or infinite, before the bad step touches the parameters; an
// update that makes a parameter NaN or infinite is undone, so the
// parameters are those after the last good step.
//
// Same seed, data and configuration give the same parameters bit for bit.
//
// # Evaluation and inference
//
// Evaluate reports the negative ELBO with its reconstruction and KL parts,
// the KL per latent dimension, the active units (Burda, Grosse and
// Salakhutdinov 2016) and, with K >= 2 samples, the importance-weighted
// estimate of -log p(x). Encode, Decode, Reconstruct, Generate,
// Interpolate and Score (a per-record anomaly score) are safe for
// concurrent use. They run on the lean inference path: New compiles the
// model's parts into a plan that computes on plain slices with pooled
// scratch, no graph involved, and gives the graphs' numbers (float64 to
// about 1e-12 relative, float32 to about 1e-5). A model with a part the
// plan does not know (a user-written layer that does not implement
// LeanLayer, or a user-written likelihood or prior) runs the same methods
// on pooled inference graphs instead, with the same results. A Scorer
// scores records from plain slices, one or a few per call, without
// allocating. The noise of a record
// depends only on the seed given and the record's key (its index in the
// data by default, or ScoreOptions.Keys), so its score does not depend on
// the other records, batching or concurrency; ScoreOptions.AtPosteriorMean
// gives a score with no noise at all. Score and Evaluate run any number of
// samples K in bounded memory, in blocks of at most a few thousand rows,
// and check the context between blocks. A float32 model refuses values
// beyond the float32 range with an error naming the record and feature.
//
// # Mixed records and missing values
//
// A model whose likelihood is a losses.Columns (build its columns from a
// dataset.Schema with ColumnsFromSchema; NewMLP sizes both ends from it)
// reads records of real, positive, count, binary and categorical columns
// with missing entries (NaN, see dataset.NewMissing), as in Nazabal,
// Olmos, Ghahramani and Valera 2020: the encoder sees the zero-filled
// record in the model-input layout with its observation mask, and the
// likelihood sums over observed entries only, so Train, Evaluate, Score
// and the importance-weighted estimate are over the observed entries of
// each record (not rescaled by their number). Impute fills missing entries
// with the conditional mean (mode for categories) decoded at the posterior
// mean; ImputeDraws draws seeded multiple imputations from the posterior;
// ScoreColumns returns, beside the scores, each column's contribution to
// the reconstruction term (which input drives an alarm); a Scorer gives
// the same per-column terms for one record at a time, taking NaN as a
// missing entry. All of these but ImputeDraws (which decodes its draws
// through a graph) run on the lean inference path. SetSchema and
// SetStandardizer store the schema and the standardisation in the
// checkpoint metadata, and Schema and Standardizer read them back after
// Load.
//
// # Checkpoints
//
// Save writes a safetensors file atomically (SaveTo, to any io.Writer);
// Load (LoadFrom, from an io.Reader) rebuilds the model from the
// description in its metadata, after checking the SHA-256 digest of every
// tensor and the description against the tensors; LoadWeights reads the
// weights into a model built in code. The format (tensor names, layouts,
// metadata keys, the transforms a reader must apply, versions) is
// documented for readers in any language in checkpoint_format.md in this
// package's folder.
package vae
