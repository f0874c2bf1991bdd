package vae

// The lean inference path for a model whose likelihood is a
// *losses.Columns (records of mixed columns with missing entries, see
// columns.go). Three things differ from the other likelihoods:
//
//   - The encoder reads the model-input layout of a record, written by
//     losses.Columns.EncodeRow exactly as the graphs' fillInputs writes it
//     (the record in the model's dtype, widened to float64, encoded, and
//     narrowed back): zero-filled values, one-hot categories, then the
//     observation mask; the one-hot label of a conditional model follows.
//   - The decoder gives OutputWidth values per record (a categorical
//     column one per category), not one per column.
//   - log p(x|z) and the likelihood mean come from
//     losses.Columns.LogProbRow and MeanRow, the functions the graph ops
//     run, on the decoder output widened to float64 as the ops widen it.
//     A missing (NaN) entry adds 0. The per-feature terms of an
//     evaluation (leanEval.cols, Scorer.Score's columns) are then one per
//     column: -log p(x_j | z), 0 where x_j is missing.

import (
	"context"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae/dataset"
)

// colPlan is what a plan keeps of a columns likelihood.
type colPlan struct {
	c       *losses.Columns
	schema  []losses.Column
	learned *layers.Param // raw learned log sigmas, (1, C); nil when no column learns its sigma
	outW    int           // decoder outputs per record
	encW    int           // encoder inputs per record, label excluded
}

// colWork is one goroutine's float64 scratch for a columns likelihood,
// one record long.
type colWork struct {
	x, out, lp, ls, enc, mean []float64
}

func compileColumns(c *losses.Columns, f int) (*colPlan, error) {
	schema := c.Schema()
	if len(schema) != f {
		return nil, notLean("likelihood", "columns likelihood of %d columns, model of %d features", len(schema), f)
	}
	cp := &colPlan{c: c, schema: schema, outW: c.OutputWidth(), encW: c.EncoderWidth()}
	if ps := c.Params(); len(ps) == 1 {
		if prod(ps[0].Value.Shape()) != f {
			return nil, notLean("likelihood", "columns log sigma of shape %v, want (1, %d)", ps[0].Value.Shape(), f)
		}
		cp.learned = ps[0]
	} else if len(ps) > 1 {
		return nil, notLean("likelihood", "columns likelihood with %d parameters", len(ps))
	}
	return cp, nil
}

func (cp *colPlan) newWork() *colWork {
	nc := len(cp.schema)
	return &colWork{x: make([]float64, nc), out: make([]float64, cp.outW), lp: make([]float64, nc),
		ls: make([]float64, nc), enc: make([]float64, cp.encW), mean: make([]float64, nc)}
}

// boundedLogSigma is the log sigma a learned raw value r stands for,
// MinLogSigma + softplus(r - MinLogSigma), computed in the model's dtype
// as losses.LearnedGaussian and losses.Columns compute it in their graphs.
func boundedLogSigma[T float](r T) T {
	return T(softplus(float64(r-T(losses.MinLogSigma)))) + T(losses.MinLogSigma)
}

// widen converts values of the plan's dtype into float64.
func widen[T float](dst []float64, src []T) {
	for i, v := range src {
		dst[i] = float64(v)
	}
}

// encodeColumnRows writes the encoder input of rows records held in w.x
// (with their labels, for a conditional model) into in.
func (p *planT[T]) encodeColumnRows(w *leanWork[T], labels []int, rows int, in []T) {
	cw, f, encW := w.col, p.f, p.cols.encW
	for i := 0; i < rows; i++ {
		widen(cw.x, w.x[i*f:(i+1)*f])
		p.cols.c.EncodeRow(cw.x, cw.enc)
		row := in[i*p.encIn : (i+1)*p.encIn]
		toT(row[:encW], cw.enc)
		if p.c > 0 {
			oneHot(row[encW:], labels[i])
		}
	}
}

// prepareColumns sets the log sigma of every column that learns it, read
// from the parameter at call time (entries of other columns are unused).
func (p *planT[T]) prepareColumns(w *leanWork[T]) {
	cp := p.cols
	if cp.learned == nil {
		return
	}
	r := p.k.data(cp.learned.Value)
	for j, col := range cp.schema {
		if col.LearnSigma {
			w.col.ls[j] = float64(boundedLogSigma(r[j]))
		}
	}
}

// columnsLogLik returns log p(x_obs | out) of one record (x: one value
// per column; out: the decoder's OutputWidth values) and, when cols is
// given, adds -log p(x_j | out) to cols[j] (0 for a missing entry).
func (p *planT[T]) columnsLogLik(w *leanWork[T], x, out []T, cols []float64) float64 {
	cw := w.col
	widen(cw.x, x)
	widen(cw.out, out)
	// The lengths are fixed when the plan is compiled, so LogProbRow
	// cannot fail here.
	sum, _ := p.cols.c.LogProbRow(cw.x, cw.out, cw.ls, cw.lp)
	if cols != nil {
		for j, v := range cw.lp {
			cols[j] -= v
		}
	}
	return sum
}

// columnsMeanRows writes the likelihood mean (the mode of a categorical
// column) of rows decoder output rows o into dst (one value per column
// and record), rounded to the model's dtype as the graph's Mean returns
// it.
func (p *planT[T]) columnsMeanRows(w *leanWork[T], o []T, dst []float64, rows int) {
	p.prepareColumns(w)
	cw, f, ow := w.col, p.f, p.cols.outW
	for i := 0; i < rows; i++ {
		widen(cw.out, o[i*ow:(i+1)*ow])
		_ = p.cols.c.MeanRow(cw.out, cw.ls, cw.mean) // lengths fixed at compile time
		for j, v := range cw.mean {
			dst[i*f+j] = float64(T(v))
		}
	}
}

// checkColumnValue checks value v of record i, column j of a columns
// model's records as the graphs' checkValues does: NaN (missing) passes;
// a value outside its column's support, in the model's dtype, or beyond
// that dtype's range is an error naming the record and column, wrapping
// ErrInvalidArgument.
func (m *Model) checkColumnValue(where string, i, j int, v float64) error {
	in := v
	if m.dtype == tensor.Float32 {
		in = float64(float32(v))
	}
	msg := m.cols.CheckValue(j, in)
	if msg == "" && !math.IsNaN(v) {
		msg = m.unrepresentable(v)
	}
	if msg == "" {
		return nil
	}
	return fmt.Errorf("%s: X: record %d, column %d (%q): %v %s: %w", where, i, j, m.cols.Schema()[j].Name, v, msg, layers.ErrInvalidArgument)
}

// leanScoreColumns is ScoreColumns on the lean plan, its arguments
// already checked: the per-column terms of the evaluation are the
// contributions.
func (m *Model) leanScoreColumns(ctx context.Context, data *dataset.Set, k int, opt ScoreOptions) ([]float64, *mat.Dense, error) {
	n := data.Len()
	scores := make([]float64, n)
	contrib := mat.NewDense(n, m.width, nil)
	e := leanEval{k: k, seed: opt.Seed, keys: opt.Keys, mean: opt.AtPosteriorMean, score: scores, cols: contrib.RawMatrix().Data}
	if err := m.lean.evaluate(ctx, data.Values(), data.Labels(), n, &e, defaultWorkers()); err != nil {
		return nil, nil, err
	}
	for i, s := range scores {
		if math.IsNaN(s) {
			return nil, nil, fmt.Errorf("vae.ScoreColumns: record %d: score is NaN: %w", i, ErrNonFinite)
		}
	}
	return scores, contrib, nil
}
