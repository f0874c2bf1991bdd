package losses

// Plain-slice forms of the Columns likelihood, one record at a time, for
// inference without a graph (the vae package's lean inference path). They
// run the very functions the graph ops run (columnTerms and meanRow), so
// the two paths cannot drift apart, and they allocate nothing.

// LogProbRow writes log p(x_j | out) of one record into lp (one value per
// column, 0 for a missing entry) and returns their sum, log p(x_obs |
// out): the values of ColumnLogProb and LogProb for that record. x holds
// the record (one value per column, NaN where missing, a category as its
// index), out the decoder's OutputWidth values, and logSigmas one value
// per column: the log standard deviation of each column with LearnSigma
// (as LogSigmas gives it); other entries are ignored
// (a fixed sigma is read from the column). A value outside its column's
// support gives -Inf. Wrong lengths return an error wrapping
// layers.ErrInvalidArgument.
func (c *Columns) LogProbRow(x, out, logSigmas, lp []float64) (float64, error) {
	return c.rowTerms("losses.Columns.LogProbRow", x, out, logSigmas, lp, nil, nil)
}

// rowTerms checks the lengths and runs columnTerms on one record (dOut and
// dLs nil for the log-probabilities alone), returning their sum.
func (c *Columns) rowTerms(where string, x, out, logSigmas, lp, dOut, dLs []float64) (float64, error) {
	if c == nil || c.cols == nil {
		return 0, argError(where, "c", "not made by NewColumns")
	}
	nc := len(c.cols)
	switch {
	case len(x) != nc:
		return 0, argError(where, "x", "%d values, want one per column (%d)", len(x), nc)
	case len(out) != c.width:
		return 0, argError(where, "out", "%d values, want OutputWidth (%d)", len(out), c.width)
	case len(logSigmas) != nc:
		return 0, argError(where, "logSigmas", "%d values, want one per column (%d)", len(logSigmas), nc)
	case len(lp) != nc:
		return 0, argError(where, "lp", "%d values, want one per column (%d)", len(lp), nc)
	case dOut != nil && len(dOut) != c.width:
		return 0, argError(where, "dOut", "%d values, want OutputWidth (%d)", len(dOut), c.width)
	case dOut != nil && len(dLs) != nc:
		return 0, argError(where, "dLogSigmas", "%d values, want one per column (%d)", len(dLs), nc)
	}
	columnTerms(c.cols, c.offs, x, out, logSigmas, lp, dOut, dLs)
	var s float64
	for _, v := range lp {
		s += v
	}
	return s, nil
}

// MeanRow writes the per-column mean of one record into dst (one value
// per column), as Mean computes it: the mean of a real column, exp(m +
// sigma^2/2) of a positive one, the rate of a count, the probability of a
// one of a binary column, the most probable category (an index) of a
// categorical one. out holds the decoder's OutputWidth values; logSigmas
// is as for LogProbRow. Wrong lengths return an error wrapping
// layers.ErrInvalidArgument.
func (c *Columns) MeanRow(out, logSigmas, dst []float64) error {
	const where = "losses.Columns.MeanRow"
	if c == nil || c.cols == nil {
		return argError(where, "c", "not made by NewColumns")
	}
	nc := len(c.cols)
	switch {
	case len(out) != c.width:
		return argError(where, "out", "%d values, want OutputWidth (%d)", len(out), c.width)
	case len(logSigmas) != nc:
		return argError(where, "logSigmas", "%d values, want one per column (%d)", len(logSigmas), nc)
	case len(dst) != nc:
		return argError(where, "dst", "%d values, want one per column (%d)", len(dst), nc)
	}
	meanRow(c, out, logSigmas, dst)
	return nil
}

// GradRow is LogProbRow with the derivatives of each column's term: dOut
// (OutputWidth values) receives d log p(x_j | out) / d out at the outputs
// of each column j, and dLogSigmas (one value per column) d log p(x_j |
// out) / d log sigma_j for each column with LearnSigma, 0 for the others
// and for missing entries. These are the derivatives the graph op's
// gradients use (the same function computes both). It allocates nothing;
// wrong lengths return an error wrapping layers.ErrInvalidArgument.
func (c *Columns) GradRow(x, out, logSigmas, lp, dOut, dLogSigmas []float64) (float64, error) {
	if dOut == nil {
		return 0, argError("losses.Columns.GradRow", "dOut", "nil")
	}
	return c.rowTerms("losses.Columns.GradRow", x, out, logSigmas, lp, dOut, dLogSigmas)
}
