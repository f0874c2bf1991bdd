package losses

import (
	"fmt"
	"math"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// ColumnKind names the observation model of one column of a record.
type ColumnKind string

// The column kinds. Each says what one value of the record is and which
// decoder outputs belong to it.
const (
	// ColumnReal is a real value with a Gaussian likelihood; one output,
	// the mean; sigma fixed (Column.Sigma, 0 meaning 1) or learned.
	ColumnReal ColumnKind = "real"
	// ColumnPositive is a value > 0 with a log-normal likelihood: log x
	// is Gaussian. One output, the mean of log x; sigma as for ColumnReal.
	ColumnPositive ColumnKind = "positive"
	// ColumnCount is a count 0, 1, 2, ... with a Poisson likelihood; one
	// output, the log of the rate.
	ColumnCount ColumnKind = "count"
	// ColumnBinary is 0 or 1 with a Bernoulli likelihood; one output, the
	// logit.
	ColumnBinary ColumnKind = "binary"
	// ColumnCategorical is a category index 0..Categories-1 with a
	// categorical likelihood; Categories outputs, the logits (softmax).
	ColumnCategorical ColumnKind = "categorical"
)

// Column describes one column of a record for the Columns likelihood.
type Column struct {
	// Name is the column's name, for errors and reports; may be empty.
	Name string `json:"name,omitempty"`
	// Kind is one of the Column kinds.
	Kind ColumnKind `json:"kind"`
	// Sigma is the fixed standard deviation of a real column or of log x
	// for a positive column; 0 means 1. Ignored when LearnSigma is set.
	Sigma float64 `json:"sigma,omitempty"`
	// LearnSigma gives a real or positive column a learned standard
	// deviation, shared by all records (one parameter per column).
	LearnSigma bool `json:"learn_sigma,omitempty"`
	// Categories is the number of categories of a categorical column (at
	// least 2); zero for every other kind.
	Categories int `json:"categories,omitempty"`
}

// outputs returns the number of decoder outputs the column takes.
func (c Column) outputs() int {
	if c.Kind == ColumnCategorical {
		return c.Categories
	}
	return 1
}

func (c Column) sigma() float64 {
	if c.Sigma == 0 {
		return 1
	}
	return c.Sigma
}

// label names column j for errors.
func (c Column) label(j int) string {
	if c.Name != "" {
		return fmt.Sprintf("column %d (%q)", j, c.Name)
	}
	return fmt.Sprintf("column %d", j)
}

// checkColumns validates a column list and returns each column's first
// decoder output and the total output width.
func checkColumns(where string, cols []Column) (offs []int, width int, err error) {
	if len(cols) == 0 {
		return nil, 0, argError(where, "columns", "empty")
	}
	offs = make([]int, len(cols))
	for j, c := range cols {
		switch c.Kind {
		case ColumnReal, ColumnPositive:
			if c.Categories != 0 {
				return nil, 0, argError(where, c.label(j), "categories %d on a %s column", c.Categories, c.Kind)
			}
			if c.Sigma < 0 || math.IsNaN(c.Sigma) || math.IsInf(c.Sigma, 0) {
				return nil, 0, argError(where, c.label(j), "sigma %v, want a finite value >= 0 (0 means 1)", c.Sigma)
			}
		case ColumnCount, ColumnBinary:
			if c.Categories != 0 || c.Sigma != 0 || c.LearnSigma {
				return nil, 0, argError(where, c.label(j), "a %s column takes no sigma or categories", c.Kind)
			}
		case ColumnCategorical:
			if c.Categories < 2 {
				return nil, 0, argError(where, c.label(j), "categorical with %d categories, want at least 2", c.Categories)
			}
			if c.Sigma != 0 || c.LearnSigma {
				return nil, 0, argError(where, c.label(j), "a categorical column takes no sigma")
			}
		default:
			return nil, 0, argError(where, c.label(j), "unknown kind %q", c.Kind)
		}
		offs[j] = width
		width += c.outputs()
	}
	return offs, width, nil
}

// ColumnsLogProb returns log p(x_j | out) per record and column, shape
// (N, C), for a record of C columns described by cols. x has shape (N, C)
// (a categorical column holds the category index); out has shape (N, W),
// W the sum of the columns' outputs in column order; logSigma has shape
// (1, C) and gives log sigma of the columns with LearnSigma (other entries
// are ignored). A NaN in x marks a missing entry: its log-probability is 0
// and it passes no gradient. Per column:
//
//	real:        log N(x; m, sigma^2)
//	positive:    log N(log x; m, sigma^2) - log x       (log-normal)
//	count:       x*eta - exp(eta) - lgamma(x + 1)       (Poisson, rate exp(eta))
//	binary:      x*l - softplus(l)                      (Bernoulli, logit l)
//	categorical: l_x - log sum_k exp(l_k)               (softmax, stable)
//
// An x outside a column's support (a positive value <= 0, a negative or
// non-integer count, a binary value other than 0 or 1, a category index out
// of range) gives -Inf. Gradients flow to out and logSigma, not to x.
func ColumnsLogProb(cols []Column, x, out, logSigma *G.Node) (*G.Node, error) {
	const where = "losses.ColumnsLogProb"
	offs, width, err := checkColumns(where, cols)
	if err != nil {
		return nil, err
	}
	if err := checkMatrix(where, "x", x); err != nil {
		return nil, err
	}
	if err := checkMatrix(where, "out", out); err != nil {
		return nil, err
	}
	if err := checkMatrix(where, "logSigma", logSigma); err != nil {
		return nil, err
	}
	n := x.Shape()[0]
	if x.Shape()[1] != len(cols) {
		return nil, argError(where, "x", "has %d columns, the schema %d", x.Shape()[1], len(cols))
	}
	if s := out.Shape(); s[0] != n || s[1] != width {
		return nil, argError(where, "out", "shape %v, want (%d, %d): one output per column, one per category", s, n, width)
	}
	if s := logSigma.Shape(); s[0] != 1 || s[1] != len(cols) {
		return nil, argError(where, "logSigma", "shape %v, want (1, %d)", s, len(cols))
	}
	if out.Dtype() != x.Dtype() || logSigma.Dtype() != x.Dtype() {
		return nil, argError(where, "out", "dtypes %v, %v, %v differ", x.Dtype(), out.Dtype(), logSigma.Dtype())
	}
	op := &columnsOp{cols: append([]Column(nil), cols...), offs: offs, width: width}
	lp, err := G.ApplyOp(op, x, out, logSigma)
	if err != nil {
		return nil, opError(where, "columns", err)
	}
	return lp, nil
}

// Columns is the likelihood of a record of mixed columns (Nazabal, Olmos,
// Ghahramani and Valera 2020, "Handling incomplete heterogeneous data
// using VAEs"): each column has its own observation model (see Column)
// and log p(x | z) is the sum of the columns' log-probabilities, over the
// observed entries only (a NaN in x is missing and contributes 0).
//
// The record x has one value per column (a categorical column holds the
// category index); the decoder output has OutputWidth values per record,
// the columns' outputs in column order. With any LearnSigma column the
// likelihood has one parameter, named "<name>.log_sigma", shape (1, C),
// starting at 0, with the soft lower bound of LearnedGaussian (MinLogSigma);
// entries of columns without LearnSigma are unused.
type Columns struct {
	cols     []Column
	offs     []int
	width    int
	name     string
	logSigma *layers.Param
}

// NewColumns returns the likelihood of records described by cols, in
// dtype; name prefixes its parameter (required when a column learns sigma).
func NewColumns(name string, cols []Column, dtype tensor.Dtype) (*Columns, error) {
	const where = "losses.NewColumns"
	offs, width, err := checkColumns(where, cols)
	if err != nil {
		return nil, err
	}
	if dtype != tensor.Float32 && dtype != tensor.Float64 {
		return nil, argError(where, "dtype", "%v is not float32 or float64", dtype)
	}
	c := &Columns{cols: append([]Column(nil), cols...), offs: offs, width: width, name: name}
	for _, col := range cols {
		if col.LearnSigma {
			if name == "" {
				return nil, argError(where, "name", "empty, and a column learns its sigma")
			}
			v := tensor.New(tensor.Of(dtype), tensor.WithShape(1, len(cols)))
			c.logSigma = &layers.Param{Name: name + ".log_sigma", Value: v}
			break
		}
	}
	return c, nil
}

// Schema returns a copy of the column descriptions.
func (c *Columns) Schema() []Column { return append([]Column(nil), c.cols...) }

// Name returns the parameter prefix given to NewColumns.
func (c *Columns) Name() string { return c.name }

// OutputWidth returns W, the decoder outputs per record.
func (c *Columns) OutputWidth() int { return c.width }

// Offsets returns the first decoder output of each column.
func (c *Columns) Offsets() []int { return append([]int(nil), c.offs...) }

// logSigmaNode returns the (1, C) log sigma: the bounded parameter, or a
// constant row holding log Sigma of each fixed column.
func (c *Columns) logSigmaNode(s *layers.Scope, like *G.Node) (*G.Node, error) {
	const where = "losses.Columns"
	if c.logSigma != nil {
		if s == nil {
			return nil, argError(where, "s", "nil scope")
		}
		return boundedLogSigma(where, s.Bind(c.logSigma))
	}
	vals := make([]float64, len(c.cols))
	for j, col := range c.cols {
		vals[j] = math.Log(col.sigma())
	}
	var t *tensor.Dense
	if like.Dtype() == tensor.Float32 {
		f := make([]float32, len(vals))
		for i, v := range vals {
			f[i] = float32(v)
		}
		t = tensor.New(tensor.WithShape(1, len(vals)), tensor.WithBacking(f))
	} else {
		t = tensor.New(tensor.WithShape(1, len(vals)), tensor.WithBacking(vals))
	}
	return G.NewConstant(t, G.WithName(fmt.Sprintf("columns_log_sigma_%d", like.ID()))), nil
}

// ColumnLogProb returns log p(x_j | out) per record and column, shape
// (N, C): the per-column terms LogProb sums. Missing (NaN) entries are 0.
func (c *Columns) ColumnLogProb(s *layers.Scope, x, out *G.Node) (*G.Node, error) {
	const where = "losses.Columns.ColumnLogProb"
	if c == nil || c.cols == nil {
		return nil, argError(where, "c", "not made by NewColumns")
	}
	if err := checkMatrix(where, "x", x); err != nil {
		return nil, err
	}
	if c.logSigma != nil && x.Dtype() != c.logSigma.Value.Dtype() {
		return nil, argError(where, "x", "dtype %v differs from the likelihood's %v", x.Dtype(), c.logSigma.Value.Dtype())
	}
	ls, err := c.logSigmaNode(s, x)
	if err != nil {
		return nil, err
	}
	lp, err := ColumnsLogProb(c.cols, x, out, ls)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return lp, nil
}

// LogProb returns log p(x_obs | out) per record, shape (N): the sum over
// the observed columns.
func (c *Columns) LogProb(s *layers.Scope, x, out *G.Node) (*G.Node, error) {
	lp, err := c.ColumnLogProb(s, x, out)
	if err != nil {
		return nil, err
	}
	return PerSample(lp)
}

// Mean returns, per record and column, shape (N, C): the mean of a real
// column, exp(m + sigma^2/2) for a positive one, the rate exp(eta) of a
// count, the probability of a one for a binary column and the most
// probable category (the mode, as an index) of a categorical column. No
// gradient flows through it.
func (c *Columns) Mean(s *layers.Scope, out *G.Node) (*G.Node, error) {
	const where = "losses.Columns.Mean"
	if c == nil || c.cols == nil {
		return nil, argError(where, "c", "not made by NewColumns")
	}
	if err := checkMatrix(where, "out", out); err != nil {
		return nil, err
	}
	if out.Shape()[1] != c.width {
		return nil, argError(where, "out", "has %d values per record, want %d", out.Shape()[1], c.width)
	}
	ls, err := c.logSigmaNode(s, out)
	if err != nil {
		return nil, err
	}
	m, err := G.ApplyOp(&columnsMeanOp{c: c}, out, ls)
	if err != nil {
		return nil, opError(where, "mean", err)
	}
	return m, nil
}

// Params returns the log sigma parameter, or none.
func (c *Columns) Params() []*layers.Param {
	if c == nil || c.logSigma == nil {
		return nil
	}
	return []*layers.Param{c.logSigma}
}

// LogSigmas returns the log standard deviation each real or positive
// column uses (the bounded learned value or log Sigma); 0 for other kinds.
func (c *Columns) LogSigmas() []float64 {
	out := make([]float64, len(c.cols))
	var learned []float64
	if c.logSigma != nil {
		learned = toFloat64(c.logSigma.Value.Data())
	}
	for j, col := range c.cols {
		switch {
		case col.Kind != ColumnReal && col.Kind != ColumnPositive:
		case col.LearnSigma && learned != nil:
			r := learned[j]
			out[j] = MinLogSigma + softplusF(r-MinLogSigma)
		default:
			out[j] = math.Log(col.sigma())
		}
	}
	return out
}

// Sample draws one record per row of out (row-major, N rows of
// OutputWidth values) from p(x | out) into dst (N rows of C values), with
// the log sigmas of LogSigmas.
func (c *Columns) Sample(rng *rand.Rand, out []float64, logSigmas []float64, dst []float64) error {
	const where = "losses.Columns.Sample"
	if rng == nil {
		return argError(where, "rng", "nil")
	}
	nc := len(c.cols)
	if len(out)%c.width != 0 || len(dst) != len(out)/c.width*nc || len(logSigmas) != nc {
		return argError(where, "out", "%d outputs and %d destinations do not fit %d outputs and %d columns per record", len(out), len(dst), c.width, nc)
	}
	for i := 0; i < len(out)/c.width; i++ {
		row := out[i*c.width : (i+1)*c.width]
		for j, col := range c.cols {
			o := row[c.offs[j]]
			var v float64
			switch col.Kind {
			case ColumnReal:
				v = o + math.Exp(logSigmas[j])*rng.NormFloat64()
			case ColumnPositive:
				v = math.Exp(o + math.Exp(logSigmas[j])*rng.NormFloat64())
			case ColumnCount:
				v = poisson(rng, math.Exp(o))
			case ColumnBinary:
				if rng.Float64() < 1/(1+math.Exp(-o)) {
					v = 1
				}
			case ColumnCategorical:
				lg := row[c.offs[j] : c.offs[j]+col.Categories]
				mx := math.Inf(-1)
				for _, l := range lg {
					mx = math.Max(mx, l)
				}
				tot := 0.0
				for _, l := range lg {
					tot += math.Exp(l - mx)
				}
				u := rng.Float64() * tot
				v = float64(len(lg) - 1)
				for k, l := range lg {
					u -= math.Exp(l - mx)
					if u < 0 {
						v = float64(k)
						break
					}
				}
			}
			dst[i*nc+j] = v
		}
	}
	return nil
}

// poisson draws from a Poisson distribution of the given rate: by counting
// uniform products below exp(-rate) for small rates (Knuth, TAOCP vol. 2,
// 3.4.1), and by a rounded normal approximation above 30 (common practice).
func poisson(rng *rand.Rand, rate float64) float64 {
	if !(rate > 0) {
		return 0
	}
	if rate > 30 {
		return math.Max(0, math.Round(rate+math.Sqrt(rate)*rng.NormFloat64()))
	}
	l, k, p := math.Exp(-rate), 0.0, 1.0
	for {
		p *= rng.Float64()
		if p <= l {
			return k
		}
		k++
	}
}

func softplusF(x float64) float64 {
	return math.Max(x, 0) + math.Log1p(math.Exp(-math.Abs(x)))
}

func toFloat64(d any) []float64 {
	switch v := d.(type) {
	case []float64:
		return append([]float64(nil), v...)
	case []float32:
		out := make([]float64, len(v))
		for i, x := range v {
			out[i] = float64(x)
		}
		return out
	}
	return nil
}

// EncoderWidth returns the values per record of the model-input layout
// that EncodeRow writes: OutputWidth values for the columns (a categorical
// column one-hot) and one mask value per column.
func (c *Columns) EncoderWidth() int { return c.width + len(c.cols) }

// EncodeRow writes the model-input layout of one record x (one value per
// column, NaN where missing) into dst (EncoderWidth values): per column a
// real value as is, log x of a positive value, log(1 + x) of a count, a
// binary value as is, the one-hot vector of a category, all zeros for a
// missing entry; then the observation mask, 1 observed and 0 missing
// (Nazabal et al. 2020: the encoder sees the zero-filled record and its
// mask). A value outside its column's support is written as missing.
func (c *Columns) EncodeRow(x, dst []float64) {
	nc := len(c.cols)
	for k := range dst[:c.width+nc] {
		dst[k] = 0
	}
	for j, col := range c.cols {
		v := x[j]
		if math.IsNaN(v) || c.support(j, v) != "" {
			continue
		}
		o := c.offs[j]
		switch col.Kind {
		case ColumnPositive:
			dst[o] = math.Log(v)
		case ColumnCount:
			dst[o] = math.Log1p(v)
		case ColumnCategorical:
			dst[o+int(v)] = 1
		default:
			dst[o] = v
		}
		dst[c.width+j] = 1
	}
}

// CheckValue reports why v cannot be a value of column j ("" when it can;
// NaN, a missing entry, can).
func (c *Columns) CheckValue(j int, v float64) string {
	if math.IsNaN(v) {
		return ""
	}
	return c.support(j, v)
}

func (c *Columns) support(j int, v float64) string {
	col := c.cols[j]
	if math.IsInf(v, 0) {
		return "is not finite"
	}
	switch col.Kind {
	case ColumnPositive:
		if !(v > 0) {
			return "is not > 0 (a positive column)"
		}
	case ColumnCount:
		if v < 0 || v != math.Floor(v) {
			return "is not a count 0, 1, 2, ..."
		}
	case ColumnBinary:
		if v != 0 && v != 1 {
			return "is not 0 or 1 (a binary column)"
		}
	case ColumnCategorical:
		if v < 0 || v != math.Floor(v) || v >= float64(col.Categories) {
			return fmt.Sprintf("is not a category index 0..%d", col.Categories-1)
		}
	}
	return ""
}
