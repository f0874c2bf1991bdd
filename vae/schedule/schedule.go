package schedule

import (
	"fmt"
	"math"

	"lowerbound.dev/internal/errs"
)

// ErrInvalidArgument is wrapped by every error that reports a bad field or
// argument. The message names the type (or function) and the field. It is
// the SDK's one sentinel for bad arguments (layers.ErrInvalidArgument holds the same value).
var ErrInvalidArgument = errs.InvalidArgument

func argError(where, field, format string, a ...any) error {
	return fmt.Errorf("%s: %s: %s: %w", where, field, fmt.Sprintf(format, a...), ErrInvalidArgument)
}

// checkWeight reports a value that is NaN, infinite or negative.
func checkWeight(where, field string, v float64) error {
	if math.IsNaN(v) || math.IsInf(v, 0) || v < 0 {
		return argError(where, field, "must be finite and >= 0, have %v", v)
	}
	return nil
}

// Beta is the weight of the KL term at a training step. Steps count from 0
// (the first optimiser step is step 0); a negative step is treated as 0.
// Implementations must be safe for concurrent use and must not panic.
type Beta interface {
	At(step int) float64
}

// Constant is the same beta at every step. Value 1 gives the plain ELBO.
type Constant struct {
	Value float64 `json:"value"`
}

// At returns c.Value.
func (c Constant) At(int) float64 { return c.Value }

// Validate reports a Value that is not finite and non-negative.
func (c Constant) Validate() error {
	return checkWeight("schedule.Constant", "Value", c.Value)
}

// LinearWarmup is KL cost annealing (Bowman et al. 2016, "Generating
// Sentences from a Continuous Space", section 3.1): the KL weight starts
// small and grows during training so the decoder learns to use z before
// the KL term can collapse the posterior onto the prior. The paper only asks
// for a gradual increase; the linear ramp used here is common practice:
//
//	beta(step) = Start + (End - Start) * step / Steps   for 0 <= step < Steps
//	beta(step) = End                                   for step >= Steps
//
// Steps = 0 means no warm-up: End from step 0. Start may exceed End (a
// decreasing ramp).
type LinearWarmup struct {
	Start float64 `json:"start"`
	End   float64 `json:"end"`
	Steps int     `json:"steps"`
}

// At returns beta at step. With Steps <= 0 it returns End.
func (l LinearWarmup) At(step int) float64 {
	if step < 0 {
		step = 0
	}
	if l.Steps <= 0 || step >= l.Steps {
		return l.End
	}
	return l.Start + (l.End-l.Start)*float64(step)/float64(l.Steps)
}

// Validate reports a Start or End that is not finite and non-negative, or a
// negative Steps.
func (l LinearWarmup) Validate() error {
	const where = "schedule.LinearWarmup"
	if err := checkWeight(where, "Start", l.Start); err != nil {
		return err
	}
	if err := checkWeight(where, "End", l.End); err != nil {
		return err
	}
	if l.Steps < 0 {
		return argError(where, "Steps", "must be >= 0, have %d", l.Steps)
	}
	return nil
}

// Cyclical is the cyclical annealing schedule of Fu et al. 2019 ("Cyclical
// Annealing Schedule: A Simple Approach to Mitigating KL Vanishing"). The
// paper (from memory, its section on the cyclical schedule) defines, for
// iteration t = 1..T split into M cycles,
//
//	beta_t = f(tau)  if tau <= R
//	beta_t = 1       if tau >  R
//	tau    = mod(t - 1, ceil(T/M)) / (T/M)
//
// with f monotonically increasing and, in their experiments, linear:
// f(tau) = tau/R. Here the cycle length T/M is given directly as Period and
// steps count from 0 (step = t - 1), so
//
//	tau = (step mod Period) / Period
//	beta(step) = Max * min(1, tau / Ratio)
//
// Ratio is R, the fraction of each cycle spent increasing; the rest of the
// cycle holds beta at Max (the paper's 1). Each cycle restarts at 0.
type Cyclical struct {
	Period int     `json:"period"`
	Ratio  float64 `json:"ratio"`
	Max    float64 `json:"max"`
}

// At returns beta at step. With Period <= 0 or Ratio <= 0 (invalid fields)
// it returns Max.
func (c Cyclical) At(step int) float64 {
	if step < 0 {
		step = 0
	}
	if c.Period <= 0 || !(c.Ratio > 0) {
		return c.Max
	}
	tau := float64(step%c.Period) / float64(c.Period)
	if tau >= c.Ratio {
		return c.Max
	}
	return c.Max * tau / c.Ratio
}

// Validate reports a Period below 1, a Ratio outside (0, 1], or a Max that
// is not finite and non-negative.
func (c Cyclical) Validate() error {
	const where = "schedule.Cyclical"
	if c.Period < 1 {
		return argError(where, "Period", "must be >= 1, have %d", c.Period)
	}
	if !(c.Ratio > 0 && c.Ratio <= 1) {
		return argError(where, "Ratio", "must be in (0, 1], have %v", c.Ratio)
	}
	return checkWeight(where, "Max", c.Max)
}

// FreeBits is the free-bits objective of Kingma et al. 2016 ("Improved
// Variational Inference with Inverse Autoregressive Flow", the paragraph on
// free bits in the appendix of the arXiv version, from memory). The paper
// divides the latent variables into K groups and replaces the KL term by
//
//	sum_{j=1..K} max(lambda, E_minibatch[ KL(q(z_j | x) || p(z_j)) ])
//
// so a group whose average KL is below lambda costs the constant lambda and
// gets no gradient pushing it further towards the prior. This package uses
// one group per latent dimension. Lambda is in nats (natural logarithms),
// per dimension. The trainer applies it in the graph with losses.FreeBits,
// which agrees with Objective.
type FreeBits struct {
	Lambda float64 `json:"lambda"`
}

// Validate reports a Lambda that is not finite and non-negative.
func (f FreeBits) Validate() error {
	return checkWeight("schedule.FreeBits", "Lambda", f.Lambda)
}

// Objective returns sum_j max(Lambda, kl[j]) and, for each j, whether the
// dimension is clamped: clamped[j] is true when kl[j] < Lambda, that is when
// the term is the constant Lambda and the dimension gets no gradient. At
// kl[j] == Lambda the dimension is not clamped.
//
// kl[j] is the KL of latent dimension j averaged over the minibatch (not
// summed over it). It may be slightly negative (a Monte Carlo estimate) or
// +Inf; a NaN is an error naming its index, as are an empty slice and an
// invalid Lambda.
func (f FreeBits) Objective(kl []float64) (total float64, clamped []bool, err error) {
	const where = "schedule.FreeBits.Objective"
	if err := f.Validate(); err != nil {
		return 0, nil, err
	}
	if len(kl) == 0 {
		return 0, nil, argError(where, "kl", "empty")
	}
	clamped = make([]bool, len(kl))
	for j, v := range kl {
		if math.IsNaN(v) {
			return 0, nil, argError(where, "kl", "NaN at dimension %d", j)
		}
		if v < f.Lambda {
			clamped[j] = true
			total += f.Lambda
		} else {
			total += v
		}
	}
	return total, clamped, nil
}

// Capacity is the controlled capacity increase of Burgess et al. 2018
// ("Understanding disentangling in beta-VAE", section 5, from memory): the
// objective
//
//	E_q[log p(x | z)] - Gamma * |KL(q(z | x) || p(z)) - C|
//
// where the target C grows linearly from 0 to Max over Steps steps (and stays
// at Max after), so the encoder is allowed to carry gradually more
// information. Gamma is large (the paper's runs used values in the hundreds
// or thousands); Max and KL are in nats.
type Capacity struct {
	Gamma float64 `json:"gamma"`
	Max   float64 `json:"max"`
	Steps int     `json:"steps"`
}

// Target returns C at step (steps count from 0; a negative step is 0):
// Max * step / Steps before step Steps and Max from then on. Steps <= 0
// gives Max at every step.
func (c Capacity) Target(step int) float64 {
	// The same ramp as a linear warm-up from 0 to Max.
	return LinearWarmup{End: c.Max, Steps: c.Steps}.At(step)
}

// Penalty returns Gamma * |kl - Target(step)|, the term subtracted from the
// reconstruction log-likelihood (in the trainer's graph:
// losses.CapacityPenalty). kl is the KL per record (summed over latent
// dimensions, averaged over the minibatch).
func (c Capacity) Penalty(kl float64, step int) float64 {
	return c.Gamma * math.Abs(kl-c.Target(step))
}

// Validate reports a Gamma or Max that is not finite and non-negative, or a
// negative Steps.
func (c Capacity) Validate() error {
	const where = "schedule.Capacity"
	if err := checkWeight(where, "Gamma", c.Gamma); err != nil {
		return err
	}
	if err := checkWeight(where, "Max", c.Max); err != nil {
		return err
	}
	if c.Steps < 0 {
		return argError(where, "Steps", "must be >= 0, have %d", c.Steps)
	}
	return nil
}
