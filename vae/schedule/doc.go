// Package schedule holds the weighting of the KL term over training: beta
// schedules, free bits and a KL capacity target.
//
// # Beta schedules
//
// A Beta gives the weight of the KL term at a training step. Steps count
// from 0: step 0 is the first optimiser step. Negative steps are treated as
// step 0. Three schedules ship:
//
//   - Constant: the same beta at every step (beta = 1 is the plain ELBO;
//     beta > 1 is the beta-VAE of Higgins et al. 2017).
//   - LinearWarmup: KL cost annealing (Bowman et al. 2016, "Generating
//     Sentences from a Continuous Space"); beta rises linearly from Start to
//     End over Steps steps and then stays at End.
//   - Cyclical: the cyclical annealing schedule of Fu et al. 2019; the
//     warm-up is repeated in cycles of Period steps.
//
// Every schedule has a Validate method that names the bad field; At never
// panics, even on invalid fields, but call Validate (or FromSpec, which does)
// before training.
//
// # Free bits
//
// FreeBits (Kingma et al. 2016, "Improved Variational Inference with Inverse
// Autoregressive Flow") replaces the KL term by sum_j max(lambda, KL_j), so
// that no latent dimension is pushed below lambda nats. FreeBits.Objective
// computes the clamped value from the per-dimension KL averaged over a
// minibatch and reports which dimensions were clamped; the trainer mirrors
// the same choice in its graph (a clamped dimension contributes the constant
// lambda and no gradient).
//
// # KL capacity
//
// Capacity (Burgess et al. 2018, "Understanding disentangling in
// beta-VAE") replaces beta*KL by gamma*|KL - C|, where the target C grows
// linearly from 0 to Max over Steps steps. Target gives C at a step and
// Penalty the term's value.
//
// # Storing a schedule
//
// Describe turns a built-in Beta into a Spec, a kind plus its fields as
// JSON, suitable for checkpoint metadata; FromSpec rebuilds and validates it.
// FreeBits and Capacity are plain structs with JSON tags and can be stored
// as they are.
//
// # Errors
//
// Every invalid argument is reported by an error that names the type or
// function and the field, and wraps ErrInvalidArgument.
package schedule
