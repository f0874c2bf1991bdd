package vae

import (
	"context"
	"errors"
	"fmt"
	"math"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae/dataset"
)

// ScorerOptions configures a Scorer.
type ScorerOptions struct {
	// K is the number of posterior samples per record. K of 0 or 1 scores
	// a record by its negative ELBO at one sample, KL - log p(x|z) (the KL
	// in closed form when the prior has one, else log q(z|x) - log p(z) at
	// the sample); K >= 2 by the importance-weighted estimate of -log p(x)
	// (Burda, Grosse and Salakhutdinov 2016). These are the two scores of
	// Model.Score, equal to it for the same seed and keys.
	K int
	// Seed and the record's key fix the record's noise: the K*D standard
	// normals of rand.New(rand.NewPCG(Seed, key)).NormFloat64, sample by
	// sample, so a record scores the same whatever else is in the call.
	Seed uint64
	// Mean scores at the posterior mean instead of sampling, the
	// deterministic score of ScoreOptions.AtPosteriorMean:
	// -log p(x|z = mu) + KL(q(z|x) || p(z)), with the KL in closed form
	// when the prior has one and log q(mu|x) - log p(mu) for a prior
	// without one (mixture, VampPrior). K must then be 0 or 1; Seed and
	// Keys do not matter.
	Mean bool
	// Workers is the number of goroutines a call over many records may
	// use; 0 means GOMAXPROCS. Calls of up to 128 records always run on
	// the caller's goroutine.
	Workers int
}

// Records is a batch of records to score, without a data set.
type Records struct {
	// X holds the records, F values each, row-major: n = len(X)/F records.
	X []float64
	// Labels holds one class label per record for a conditional model;
	// nil for an unconditional one.
	Labels []int
	// Keys holds one noise key per record (for example a record id), so
	// that a record's score does not depend on the call it arrives in; nil
	// means each record's index in X, as Model.Score keys its records.
	Keys []uint64
}

// Scorer scores records one at a time or a few at a time, as a request
// handler does: from plain slices, into a slice the caller provides, with
// no allocation per call for models made of the SDK's own parts (the lean
// inference path: no graph runs). It is safe for concurrent use and reads
// the model's current parameters on every call, so it stays valid across
// LoadWeights; it must not be used while the model trains.
//
// A model with a part the lean path does not run (a user-written layer
// that does not implement LeanLayer, or a user-written likelihood or
// prior) is scored through the model's graphs instead, with the same
// scores, except that no per-feature terms can be asked for (such calls
// return an error wrapping ErrNotLean).
type Scorer struct {
	m    *Model
	opt  ScorerOptions
	k    int
	lean *leanPlan
	why  error
}

// NewScorer returns a Scorer with the given options.
func (m *Model) NewScorer(opt ScorerOptions) (*Scorer, error) {
	if opt.K < 0 {
		return nil, fmt.Errorf("vae.NewScorer: K: %d, want >= 0: %w", opt.K, layers.ErrInvalidArgument)
	}
	if opt.Workers < 0 {
		return nil, fmt.Errorf("vae.NewScorer: Workers: %d, want >= 0: %w", opt.Workers, layers.ErrInvalidArgument)
	}
	if opt.Mean && opt.K > 1 {
		return nil, fmt.Errorf("vae.NewScorer: K: %d with Mean, want 0 or 1: %w", opt.K, layers.ErrInvalidArgument)
	}
	return &Scorer{m: m, opt: opt, k: max(opt.K, 1), lean: m.lean, why: m.leanWhy}, nil
}

// Lean reports whether the scorer runs on the lean inference path, and
// when not, why.
func (s *Scorer) Lean() (bool, error) { return s.lean != nil, s.why }

// Options returns the scorer's options.
func (s *Scorer) Options() ScorerOptions { return s.opt }

// Score writes one score per record of r into scores (len(scores) must be
// the number of records): higher means less likely under the model. When
// columns is not nil it must hold F values per record; it receives each
// feature's part of the reconstruction term, -log p(x_j | z) averaged over
// the samples (at z = mu with Mean), so an operator sees which inputs
// drive a high score. Summed over a record's features they give its
// reconstruction term -E_q[log p(x|z)]; the score adds the KL to it (K of
// 1, or Mean) or is the importance-weighted estimate (K >= 2).
//
// For a model whose likelihood is a *losses.Columns (records of mixed
// columns, see ScoreColumns) F is the number of columns: a record holds
// one value per column, a category as its index and NaN where the entry is
// missing, and the terms in columns are per column, -log p(x_j | z), 0 for
// a missing entry: the entries of ScoreColumns' matrix for the same noise
// (Mean matching AtPosteriorMean). The score covers the observed entries
// only.
//
// Bad input returns an error naming the record and feature: a wrong
// length, a NaN or infinite value (for a columns model: an infinite value
// or one outside its column's support, NaN being a missing entry), a value
// that overflows the float32 of a float32 model (wrapping
// ErrInvalidArgument); a missing or out-of-range label (wrapping
// ErrLabel); labels for an unconditional model (wrapping
// ErrNotConditional).
func (s *Scorer) Score(ctx context.Context, scores []float64, r Records, columns []float64) error {
	const where = "vae.Scorer.Score"
	n, err := s.m.checkRecords(where, r)
	if err != nil {
		return err
	}
	if len(scores) != n {
		return fmt.Errorf("%s: scores: length %d, want one per record (%d): %w", where, len(scores), n, layers.ErrInvalidArgument)
	}
	if columns != nil && len(columns) != n*s.m.width {
		return fmt.Errorf("%s: columns: length %d, want %d (%d records of %d features): %w", where, len(columns), n*s.m.width, n, s.m.width, layers.ErrInvalidArgument)
	}
	if s.lean == nil {
		return s.graphScore(ctx, scores, r, columns)
	}
	workers := s.opt.Workers
	if workers == 0 {
		workers = defaultWorkers()
	}
	if n <= 2*leanRows {
		workers = 1
	}
	e := leanEval{k: s.k, seed: s.opt.Seed, keys: r.Keys, mean: s.opt.Mean, score: scores, cols: columns}
	return s.lean.evaluate(ctx, r.X, r.Labels, n, &e, workers)
}

// graphScore scores through Model.Score, for models the lean path does not
// run.
func (s *Scorer) graphScore(ctx context.Context, scores []float64, r Records, columns []float64) error {
	const where = "vae.Scorer.Score"
	if columns != nil {
		return fmt.Errorf("%s: columns: %w (%v): the graph path has no per-feature terms", where, ErrNotLean, s.why)
	}
	n := len(r.X) / s.m.width
	data, err := dataset.New(r.X, n, s.m.width)
	if err != nil {
		return fmt.Errorf("%s: %w", where, err)
	}
	if s.m.cfg.Classes > 0 {
		if data, err = data.WithLabels(r.Labels, s.m.cfg.Classes); err != nil {
			return fmt.Errorf("%s: %w", where, err)
		}
	}
	out, err := s.m.Score(ctx, data, ScoreOptions{K: s.opt.K, Seed: s.opt.Seed, Keys: r.Keys, AtPosteriorMean: s.opt.Mean})
	if err != nil {
		return err
	}
	copy(scores, out)
	return nil
}

// ScoreRecords scores the records of r with a Scorer made for the call:
// the convenient form of Scorer.Score for one-off calls (it allocates the
// result; keep a Scorer and a result slice to avoid that).
func (m *Model) ScoreRecords(ctx context.Context, r Records, opt ScorerOptions) ([]float64, error) {
	s, err := m.NewScorer(opt)
	if err != nil {
		return nil, err
	}
	if m.width == 0 {
		return nil, errors.New("vae.ScoreRecords: model has no features")
	}
	scores := make([]float64, len(r.X)/m.width)
	if err := s.Score(ctx, scores, r, nil); err != nil {
		return nil, err
	}
	return scores, nil
}

// checkRecords validates a batch of records and returns how many there
// are.
func (m *Model) checkRecords(where string, r Records) (int, error) {
	f := m.width
	if len(r.X) == 0 || len(r.X)%f != 0 {
		return 0, fmt.Errorf("%s: X: %d values, want a positive multiple of the model's %d features: %w", where, len(r.X), f, layers.ErrInvalidArgument)
	}
	n := len(r.X) / f
	f32 := m.dtype == tensor.Float32
	for i, v := range r.X {
		if m.cols != nil {
			if err := m.checkColumnValue(where, i/f, i%f, v); err != nil {
				return 0, err
			}
			continue
		}
		bad := ""
		switch {
		case math.IsNaN(v):
			bad = "is NaN"
		case math.IsInf(v, 0):
			bad = "is infinite"
		case f32 && math.IsInf(float64(float32(v)), 0):
			bad = "overflows float32 (the model's dtype)"
		}
		if bad != "" {
			return 0, fmt.Errorf("%s: X: record %d, feature %d: %v %s: %w", where, i/f, i%f, v, bad, layers.ErrInvalidArgument)
		}
	}
	if r.Keys != nil && len(r.Keys) != n {
		return 0, fmt.Errorf("%s: Keys: %d keys, want one per record (%d): %w", where, len(r.Keys), n, layers.ErrInvalidArgument)
	}
	if err := m.checkLabels(where[len("vae."):], r.Labels, n); err != nil {
		return 0, err
	}
	return n, nil
}
