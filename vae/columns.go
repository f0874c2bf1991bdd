package vae

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"

	"gonum.org/v1/gonum/mat"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae/dataset"
)

// Mixed records and missing values (Nazabal, Olmos, Ghahramani and Valera
// 2020). A model whose likelihood is a *losses.Columns reads records of
// mixed columns in the raw-record layout (one value per column, a category
// as its index, NaN where missing). Its encoder sees the model-input
// layout (losses.Columns.EncodeRow: zero-filled values, one-hot categories,
// then the observation mask), and its likelihood sums over the observed
// entries only. So:
//
//   - Train maximises the ELBO of the observed entries,
//     E_q[log p(x_obs | z)] - KL(q(z | x_obs, mask) || p(z)).
//   - Score, Evaluate and the importance-weighted estimate are per record
//     and over its observed entries: -log p(x_obs) (or its bound) in nats,
//     not rescaled by the number observed. Records with fewer observed
//     entries therefore tend to score lower; compare records with the same
//     number observed, or divide by it, when that matters.
//   - Impute fills the missing entries with the conditional mean (the mode
//     for a categorical column) decoded at the posterior mean; ImputeDraws
//     draws multiple imputations from the posterior, seeded.
//   - ScoreColumns returns each column's contribution to the
//     reconstruction term beside the scores.

// ErrNotColumns is returned by the calls that need a model whose
// likelihood is a *losses.Columns.
var ErrNotColumns = errors.New("vae: the model's likelihood is not a losses.Columns")

// Metadata keys under which SetSchema and SetStandardizer store JSON in
// the checkpoint (see Model.SetExtra).
const (
	ExtraSchema       = "schema"
	ExtraStandardizer = "standardizer"
)

// ColumnsFromSchema returns the likelihood columns of a dataset schema:
// each column keeps its name and kind (categories: their count); real and
// positive columns learn their sigma when learnSigma is set and have sigma
// 1 otherwise.
func ColumnsFromSchema(sc dataset.Schema, learnSigma bool) ([]losses.Column, error) {
	if err := sc.Validate(); err != nil {
		return nil, fmt.Errorf("vae.ColumnsFromSchema: %w", err)
	}
	out := make([]losses.Column, len(sc.Columns))
	for j, c := range sc.Columns {
		out[j] = losses.Column{Name: c.Name, Kind: losses.ColumnKind(c.Kind), Categories: len(c.Categories)}
		if c.Kind == dataset.KindReal || c.Kind == dataset.KindPositive {
			out[j].LearnSigma = learnSigma
		}
	}
	return out, nil
}

// SetSchema stores sc in the checkpoint metadata (key ExtraSchema) so that
// a loaded model reads raw files the same way; Schema reads it back.
func (m *Model) SetSchema(sc dataset.Schema) error {
	if err := sc.Validate(); err != nil {
		return fmt.Errorf("vae.SetSchema: %w", err)
	}
	if len(sc.Columns) != m.width {
		return fmt.Errorf("vae.SetSchema: %d columns, the model has %d features: %w", len(sc.Columns), m.width, layers.ErrInvalidArgument)
	}
	b, err := json.Marshal(sc)
	if err != nil {
		return fmt.Errorf("vae.SetSchema: %w", err)
	}
	return m.SetExtra(ExtraSchema, string(b))
}

// Schema returns the schema stored by SetSchema (or read from a
// checkpoint), and false when there is none.
func (m *Model) Schema() (dataset.Schema, bool, error) {
	raw, ok := m.Extra()[ExtraSchema]
	if !ok {
		return dataset.Schema{}, false, nil
	}
	sc, err := dataset.ReadSchema(stringsReader(raw), "checkpoint metadata "+ExtraSchema)
	if err != nil {
		return sc, true, err
	}
	return sc, true, nil
}

// SetStandardizer stores z in the checkpoint metadata (key
// ExtraStandardizer); Standardizer reads it back.
func (m *Model) SetStandardizer(z dataset.Standardizer) error {
	if err := z.Validate(); err != nil {
		return fmt.Errorf("vae.SetStandardizer: %w", err)
	}
	if len(z.Mean) != m.width {
		return fmt.Errorf("vae.SetStandardizer: %d features, the model has %d: %w", len(z.Mean), m.width, layers.ErrInvalidArgument)
	}
	b, err := json.Marshal(z)
	if err != nil {
		return fmt.Errorf("vae.SetStandardizer: %w", err)
	}
	return m.SetExtra(ExtraStandardizer, string(b))
}

// Standardizer returns the standardizer stored by SetStandardizer, and
// false when there is none.
func (m *Model) Standardizer() (dataset.Standardizer, bool, error) {
	raw, ok := m.Extra()[ExtraStandardizer]
	if !ok {
		return dataset.Standardizer{}, false, nil
	}
	var z dataset.Standardizer
	if err := json.Unmarshal([]byte(raw), &z); err != nil {
		return z, true, fmt.Errorf("vae.Model.Standardizer: %w", err)
	}
	if err := z.Validate(); err != nil || len(z.Mean) != m.width {
		return z, true, fmt.Errorf("vae.Model.Standardizer: stored standardizer does not fit the model's %d features (%v): %w", m.width, err, dataset.ErrInvalidData)
	}
	return z, true, nil
}

// ScoreColumns returns Score's scores and, beside them, each column's
// contribution to the reconstruction term of each record: an (N, C)
// matrix whose entry (i, j) is -E_q[log p(x_ij | z)], estimated with the
// same K posterior samples (or at the posterior mean with
// AtPosteriorMean), 0 for a missing entry. A row sums to the record's
// reconstruction term -E_q[log p(x_obs | z)]; the column with the largest
// entry is the input that drives the record's score most. The model's
// likelihood must be a *losses.Columns (else ErrNotColumns). A Scorer
// gives the same numbers record by record (its columns argument) without
// allocating.
func (m *Model) ScoreColumns(ctx context.Context, data *dataset.Set, opt ScoreOptions) ([]float64, *mat.Dense, error) {
	if m.cols == nil {
		return nil, nil, fmt.Errorf("vae.ScoreColumns: %w", ErrNotColumns)
	}
	if err := m.checkData("ScoreColumns", data); err != nil {
		return nil, nil, err
	}
	if opt.K < 0 || opt.AtPosteriorMean && opt.K > 1 {
		return nil, nil, fmt.Errorf("vae.ScoreColumns: K: %d (with AtPosteriorMean %v), want >= 0 (0 or 1 at the posterior mean): %w", opt.K, opt.AtPosteriorMean, layers.ErrInvalidArgument)
	}
	k, n, c := max(opt.K, 1), data.Len(), m.width
	if n == 0 {
		return nil, nil, fmt.Errorf("vae.ScoreColumns: data: no records: %w", layers.ErrInvalidArgument)
	}
	if err := checkKeys("ScoreColumns", opt.Keys, n); err != nil {
		return nil, nil, err
	}
	if m.lean != nil {
		return m.leanScoreColumns(ctx, data, k, opt)
	}
	scores := make([]float64, n)
	contrib := mat.NewDense(n, c, nil)
	run := sampledRun{data: data, k: k, seed: opt.Seed, keys: opt.Keys, atMean: opt.AtPosteriorMean}
	err := m.forSampled(ctx, run, defaultInferLimits(), func(first int, ch *sampledChunk) error {
		for i := 0; i < ch.count; i++ {
			s := ch.kl[i] - ch.logLik[i]
			if k >= 2 {
				s = -ch.iw[i]
			}
			if math.IsNaN(s) {
				return fmt.Errorf("vae.ScoreColumns: record %d: score is NaN: %w", first+i, ErrNonFinite)
			}
			scores[first+i] = s
			for j := 0; j < c; j++ {
				contrib.Set(first+i, j, -ch.cols[i*c+j])
			}
		}
		return nil
	})
	if err != nil {
		return nil, nil, err
	}
	return scores, contrib, nil
}

// Impute returns the records of data (N, C) with every missing entry
// replaced by its conditional mean given the observed entries of its
// record, decoded at the posterior mean z = mu(x_obs): the mean of a real
// column, exp(m + sigma^2/2) of a positive one, the rate of a count, the
// probability of a one of a binary column and the most probable category
// (the mode) of a categorical one (see losses.Columns.Mean). Observed
// entries are returned unchanged. The model's likelihood must be a
// *losses.Columns.
func (m *Model) Impute(ctx context.Context, data *dataset.Set) (*mat.Dense, error) {
	if m.cols == nil {
		return nil, fmt.Errorf("vae.Impute: %w", ErrNotColumns)
	}
	rec, err := m.Reconstruct(ctx, data)
	if err != nil {
		return nil, fmt.Errorf("vae.Impute: %w", err)
	}
	for i := 0; i < data.Len(); i++ {
		for j, v := range data.Row(i) {
			if !math.IsNaN(v) {
				rec.Set(i, j, v)
			}
		}
	}
	return rec, nil
}

// ImputeDraws returns draws multiple imputations of data, each (N, C):
// for draw t and record i, z is drawn from q(z | x_obs) and every missing
// entry from p(x_j | z); observed entries are unchanged. The noise of
// record i comes from rand.New(rand.NewPCG(seed, i)) (math/rand/v2), so the
// result is repeatable and a record's draws do not depend on the others.
// The model's likelihood must be a *losses.Columns and the model
// unconditional.
func (m *Model) ImputeDraws(ctx context.Context, data *dataset.Set, draws int, seed uint64) ([]*mat.Dense, error) {
	const where = "vae.ImputeDraws"
	if m.cols == nil {
		return nil, fmt.Errorf("%s: %w", where, ErrNotColumns)
	}
	if m.cfg.Classes > 0 {
		return nil, fmt.Errorf("%s: %w", where, ErrNotConditional)
	}
	if draws < 1 {
		return nil, fmt.Errorf("%s: draws: %d, want >= 1: %w", where, draws, layers.ErrInvalidArgument)
	}
	mu, sigma, err := m.Encode(ctx, data)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	n, d, c, w := data.Len(), m.latent, m.width, m.outWidth
	rngs := make([]*rand.Rand, n)
	for i := range rngs {
		rngs[i] = rand.New(rand.NewPCG(seed, uint64(i)))
	}
	ls := m.cols.LogSigmas()
	out := make([]*mat.Dense, draws)
	z := mat.NewDense(n, d, nil)
	row := make([]float64, c)
	for t := range out {
		for i := 0; i < n; i++ {
			for j := 0; j < d; j++ {
				z.Set(i, j, mu.At(i, j)+sigma.At(i, j)*rngs[i].NormFloat64())
			}
		}
		raw, err := m.decodeRaw(ctx, z)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", where, err)
		}
		res := mat.NewDense(n, c, nil)
		for i := 0; i < n; i++ {
			if err := m.cols.Sample(rngs[i], raw.RawRowView(i)[:w], ls, row); err != nil {
				return nil, fmt.Errorf("%s: %w", where, err)
			}
			for j, v := range data.Row(i) {
				if math.IsNaN(v) {
					res.Set(i, j, row[j])
				} else {
					res.Set(i, j, v)
				}
			}
		}
		out[t] = res
	}
	return out, nil
}

// decodeRaw maps latent rows to the decoder output (N, W).
func (m *Model) decodeRaw(ctx context.Context, z *mat.Dense) (*mat.Dense, error) {
	n, d := z.Dims()
	out := mat.NewDense(n, m.outWidth, nil)
	err := m.forChunks(ctx, kindDecodeRaw, n, 1, defaultInferLimits(), func(p *program, first int, idx []int) error {
		p.z.Zero()
		for i := range idx {
			for j := 0; j < d; j++ {
				setAt(p.z, i*d+j, z.At(first+i, j))
			}
		}
		if err := p.run(); err != nil {
			return err
		}
		copyRows(out, first, len(idx), p.values(p.mean))
		return nil
	})
	return out, err
}

func stringsReader(s string) *strings.Reader { return strings.NewReader(s) }
