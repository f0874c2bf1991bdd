package dataset

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"

	"gonum.org/v1/gonum/mat"

	"lowerbound.dev/internal/errs"
)

// ErrInvalidArgument is wrapped by every error that reports a bad argument
// (a negative size, a wrong length, an index out of range). The message
// names the function and the argument. It is the SDK's one sentinel for
// bad arguments (layers.ErrInvalidArgument holds the same value), so errors.Is works the same
// for data and graph code.
var ErrInvalidArgument = errs.InvalidArgument

// ErrInvalidData is wrapped by every error that reports bad data (as opposed
// to a bad argument): a NaN or infinite value, a malformed file, a label out
// of range, a count mismatch. The message names the file (when there is one)
// and the record and column, or the byte offset.
var ErrInvalidData = errors.New("invalid data")

// argError returns an error naming the function and the argument, wrapping
// ErrInvalidArgument.
func argError(where, arg, format string, a ...any) error {
	return fmt.Errorf("%s: %s: %s: %w", where, arg, fmt.Sprintf(format, a...), ErrInvalidArgument)
}

// dataError returns an error wrapping ErrInvalidData.
func dataError(where, format string, a ...any) error {
	return fmt.Errorf("%s: %s: %w", where, fmt.Sprintf(format, a...), ErrInvalidData)
}

// MaxClasses bounds class labels: every label must lie in [0, MaxClasses),
// so a Set never has more than MaxClasses classes, and one one-hot row never
// more than MaxClasses values. A larger label, or a larger class count
// asked for in an option, is an error.
const MaxClasses = 1 << 16

// Set is N records of F float64 features held in memory row-major, with
// optional integer class labels and an optional per-record shape.
//
// A Set is never modified after construction: every method that changes
// something (WithLabels, WithShape, Binarize, Subset, ...) returns a new Set,
// so a Set can be shared between goroutines freely.
type Set struct {
	x       []float64 // n*f values, record i at x[i*f:(i+1)*f]
	n, f    int
	labels  []int // len n, or nil
	classes int   // 0 when labels is nil
	shape   []int // product f; [f] by default
	// missing counts the NaN entries, which mark missing values; only
	// NewMissing, WithMissing and ReadCSV with CSVOptions.Missing make a
	// Set that may hold them.
	missing int
}

// New returns a Set of n records with f features each, copied from x
// (row-major, len(x) == n*f). n may be zero; f must be at least 1. Every
// value must be finite: a NaN or infinity is an error naming the record and
// feature (both 0-based).
func New(x []float64, n, f int) (*Set, error) {
	const where = "dataset.New"
	if n < 0 {
		return nil, argError(where, "n", "negative record count %d", n)
	}
	if f < 1 {
		return nil, argError(where, "f", "feature count %d, want at least 1", f)
	}
	if n > 0 && f > math.MaxInt/n {
		return nil, argError(where, "n, f", "%d x %d overflows", n, f)
	}
	if len(x) != n*f {
		return nil, argError(where, "x", "length %d, want n*f = %d*%d = %d", len(x), n, f, n*f)
	}
	return newOwned(where, slices.Clone(x), n, f)
}

// newOwned builds a Set that takes ownership of x after checking it is finite.
func newOwned(where string, x []float64, n, f int) (*Set, error) {
	if err := checkFinite(where, "", x, f); err != nil {
		return nil, err
	}
	if x == nil {
		x = []float64{}
	}
	return &Set{x: x, n: n, f: f, shape: []int{f}}, nil
}

// checkFinite reports the first NaN or infinite value in x by record and
// feature; file, when not empty, is named too.
func checkFinite(where, file string, x []float64, f int) error {
	for k, v := range x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			if file != "" {
				return dataError(where, "%s: record %d, feature %d: value %v is not finite", file, k/f, k%f, v)
			}
			return dataError(where, "record %d, feature %d: value %v is not finite", k/f, k%f, v)
		}
	}
	return nil
}

// NewMissing is New for data with missing values: a NaN in x marks a
// missing entry (an opt-in: New rejects NaN). Infinities are still an
// error naming the record and feature.
func NewMissing(x []float64, n, f int) (*Set, error) {
	const where = "dataset.NewMissing"
	nan := slices.Clone(x)
	for k, v := range nan {
		if math.IsNaN(v) {
			nan[k] = 0
		}
	}
	if _, err := New(nan, n, f); err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	s := &Set{x: slices.Clone(x), n: n, f: f, shape: []int{f}}
	if s.x == nil {
		s.x = []float64{}
	}
	s.missing = countNaN(s.x)
	return s, nil
}

func countNaN(x []float64) int {
	c := 0
	for _, v := range x {
		if math.IsNaN(v) {
			c++
		}
	}
	return c
}

// WithMissing returns a copy of s in which entry k (row-major, record
// k/F, feature k%F) is missing where observed[k] is false, for example to
// hide values at random and measure imputation. Entries already missing
// stay missing.
func (s *Set) WithMissing(observed []bool) (*Set, error) {
	const where = "dataset.Set.WithMissing"
	if s == nil {
		return nil, argError(where, "s", "nil Set")
	}
	if len(observed) != len(s.x) {
		return nil, argError(where, "observed", "length %d, want N*F = %d", len(observed), len(s.x))
	}
	c := s.clone()
	c.x = slices.Clone(s.x)
	for k, ok := range observed {
		if !ok {
			c.x[k] = math.NaN()
		}
	}
	c.missing = countNaN(c.x)
	return c, nil
}

// Missing returns the number of missing entries (NaN) in s.
func (s *Set) Missing() int { return s.missing }

// Observed reports whether feature j of record i is observed (not NaN).
func (s *Set) Observed(i, j int) bool { return !math.IsNaN(s.x[i*s.f+j]) }

// FillMask writes the observation mask of the records at idx (1 observed,
// 0 missing), row-major, into the start of dst, a []float32 or []float64
// of length at least len(idx)*Features().
func (s *Set) FillMask(dst any, idx []int) error {
	const where = "dataset.Set.FillMask"
	if s == nil {
		return argError(where, "s", "nil Set")
	}
	if err := s.checkIndex(where, idx); err != nil {
		return err
	}
	need := len(idx) * s.f
	switch d := dst.(type) {
	case []float64:
		if len(d) < need {
			return argError(where, "dst", "length %d, want at least %d", len(d), need)
		}
		for k, i := range idx {
			for j, v := range s.x[i*s.f : (i+1)*s.f] {
				d[k*s.f+j] = b2f(!math.IsNaN(v))
			}
		}
	case []float32:
		if len(d) < need {
			return argError(where, "dst", "length %d, want at least %d", len(d), need)
		}
		for k, i := range idx {
			for j, v := range s.x[i*s.f : (i+1)*s.f] {
				d[k*s.f+j] = float32(b2f(!math.IsNaN(v)))
			}
		}
	default:
		return argError(where, "dst", "type %T, want []float32 or []float64", dst)
	}
	return nil
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// FromRows returns a Set with one record per row. All rows must have the
// same, non-zero length and at least one row is needed; values must be finite.
func FromRows(rows [][]float64) (*Set, error) {
	const where = "dataset.FromRows"
	if len(rows) == 0 {
		return nil, argError(where, "rows", "no rows")
	}
	f := len(rows[0])
	if f == 0 {
		return nil, argError(where, "rows", "row 0 is empty")
	}
	x := make([]float64, 0, len(rows)*f)
	for i, r := range rows {
		if len(r) != f {
			return nil, argError(where, "rows", "row %d has %d values, row 0 has %d", i, len(r), f)
		}
		x = append(x, r...)
	}
	return newOwned(where, x, len(rows), f)
}

// FromMatrix returns a Set with one record per row of m (a gonum matrix).
func FromMatrix(m mat.Matrix) (*Set, error) {
	const where = "dataset.FromMatrix"
	if m == nil {
		return nil, argError(where, "m", "nil matrix")
	}
	r, c := m.Dims()
	if r < 1 || c < 1 {
		return nil, argError(where, "m", "empty %dx%d matrix", r, c)
	}
	x := make([]float64, r*c)
	for i := range r {
		for j := range c {
			x[i*c+j] = m.At(i, j)
		}
	}
	return newOwned(where, x, r, c)
}

// clone returns a shallow copy sharing the (immutable) backing arrays.
func (s *Set) clone() *Set {
	c := *s
	return &c
}

// WithLabels returns a copy of s carrying one class label per record. Labels
// must lie in [0, classes). classes = 0 means "infer": one more than the
// largest label. Labels and classes are bounded by MaxClasses. The labels
// are copied.
func (s *Set) WithLabels(labels []int, classes int) (*Set, error) {
	const where = "dataset.Set.WithLabels"
	if s == nil {
		return nil, argError(where, "s", "nil Set")
	}
	if len(labels) != s.n {
		return nil, argError(where, "labels", "length %d, want one per record (%d)", len(labels), s.n)
	}
	if classes < 0 || classes > MaxClasses {
		return nil, argError(where, "classes", "class count %d not in [0, %d] (MaxClasses)", classes, MaxClasses)
	}
	k, err := checkLabels(where, "", labels, classes)
	if err != nil {
		return nil, err
	}
	c := s.clone()
	c.labels = slices.Clone(labels)
	if c.labels == nil {
		c.labels = []int{}
	}
	c.classes = k
	return c, nil
}

// checkLabels validates labels against classes (0 = infer; at most
// MaxClasses) and returns the class count, which is at most MaxClasses.
func checkLabels(where, file string, labels []int, classes int) (int, error) {
	maxLabel := -1
	for i, l := range labels {
		if msg := labelProblem(l, classes); msg != "" {
			prefix := ""
			if file != "" {
				prefix = file + ": "
			}
			return 0, dataError(where, "%srecord %d: %s", prefix, i, msg)
		}
		maxLabel = max(maxLabel, l)
	}
	if classes == 0 {
		classes = maxLabel + 1
		if classes == 0 {
			classes = 1 // no records: one class keeps the labelled state meaningful
		}
	}
	return classes, nil
}

// labelProblem says what is wrong with label l given the class count
// (0 = infer), or returns "" when l is a good label.
func labelProblem(l, classes int) string {
	switch {
	case l < 0:
		return fmt.Sprintf("label %d is negative", l)
	case classes > 0 && l >= classes:
		return fmt.Sprintf("label %d out of range [0, %d]", l, classes-1)
	case l >= MaxClasses:
		return fmt.Sprintf("label %d exceeds the largest label allowed, %d (MaxClasses - 1)", l, MaxClasses-1)
	}
	return ""
}

// WithShape returns a copy of s whose records have the given shape, for
// example [1, 28, 28] for single-channel images. The product of the shape
// must equal Features(). The values are not moved: the shape only tells
// image layers how to read each row-major record.
func (s *Set) WithShape(shape ...int) (*Set, error) {
	const where = "dataset.Set.WithShape"
	if s == nil {
		return nil, argError(where, "s", "nil Set")
	}
	if len(shape) == 0 {
		return nil, argError(where, "shape", "empty shape")
	}
	p := 1
	for i, d := range shape {
		if d < 1 {
			return nil, argError(where, "shape", "dimension %d is %d, want at least 1", i, d)
		}
		if p > math.MaxInt/d {
			return nil, argError(where, "shape", "%v overflows", shape)
		}
		p *= d
	}
	if p != s.f {
		return nil, argError(where, "shape", "%v holds %d values, records have %d features", shape, p, s.f)
	}
	c := s.clone()
	c.shape = slices.Clone(shape)
	return c, nil
}

// Len returns the number of records N.
func (s *Set) Len() int { return s.n }

// Features returns the number of values per record F.
func (s *Set) Features() int { return s.f }

// Shape returns a copy of the per-record shape ([F] unless set by WithShape).
func (s *Set) Shape() []int { return slices.Clone(s.shape) }

// Row returns a copy of record i, or nil when i is out of range.
func (s *Set) Row(i int) []float64 {
	if i < 0 || i >= s.n {
		return nil
	}
	return slices.Clone(s.x[i*s.f : (i+1)*s.f])
}

// Values returns a copy of all values, row-major.
func (s *Set) Values() []float64 { return slices.Clone(s.x) }

// HasLabels reports whether the records carry class labels.
func (s *Set) HasLabels() bool { return s.labels != nil }

// Label returns the class label of record i, or -1 when the Set has no
// labels or i is out of range.
func (s *Set) Label(i int) int {
	if s.labels == nil || i < 0 || i >= s.n {
		return -1
	}
	return s.labels[i]
}

// Labels returns a copy of the labels, or nil when the Set has none.
func (s *Set) Labels() []int { return slices.Clone(s.labels) }

// Classes returns the number of classes, or 0 when the Set has no labels.
func (s *Set) Classes() int { return s.classes }

// Subset returns the records at idx, in that order (an index may repeat).
// Labels and shape are kept.
func (s *Set) Subset(idx []int) (*Set, error) {
	const where = "dataset.Set.Subset"
	if s == nil {
		return nil, argError(where, "s", "nil Set")
	}
	if err := s.checkIndex(where, idx); err != nil {
		return nil, err
	}
	c := s.clone()
	c.n = len(idx)
	c.x = make([]float64, len(idx)*s.f)
	for k, i := range idx {
		copy(c.x[k*s.f:(k+1)*s.f], s.x[i*s.f:(i+1)*s.f])
	}
	if s.missing > 0 {
		c.missing = countNaN(c.x)
	}
	if s.labels != nil {
		c.labels = make([]int, len(idx))
		for k, i := range idx {
			c.labels[k] = s.labels[i]
		}
	}
	return c, nil
}

func (s *Set) checkIndex(where string, idx []int) error {
	for k, i := range idx {
		if i < 0 || i >= s.n {
			return argError(where, "idx", "idx[%d] = %d out of range [0, %d)", k, i, s.n)
		}
	}
	return nil
}

// Split divides the records at random into a, holding round(frac*N) records,
// and b, holding the rest. Each part keeps the records' original relative
// order. The same seed gives the same split (the permutation comes from a
// math/rand/v2 PCG generator seeded with (seed, 0)). frac must lie in [0, 1].
func (s *Set) Split(frac float64, seed uint64) (a, b *Set, err error) {
	const where = "dataset.Set.Split"
	if s == nil {
		return nil, nil, argError(where, "s", "nil Set")
	}
	if !(frac >= 0 && frac <= 1) {
		return nil, nil, argError(where, "frac", "%v not in [0, 1]", frac)
	}
	perm := permute(rand.New(rand.NewPCG(seed, 0)), s.n)
	k := int(math.Round(frac * float64(s.n)))
	ia, ib := perm[:k], perm[k:]
	slices.Sort(ia)
	slices.Sort(ib)
	if a, err = s.Subset(ia); err != nil {
		return nil, nil, err
	}
	if b, err = s.Subset(ib); err != nil {
		return nil, nil, err
	}
	return a, b, nil
}

// Fill copies the records at idx, row-major and in that order, into the
// start of dst, which must be a []float32 or a []float64 of length at least
// len(idx)*Features(); the rest of dst is left as it was. It is meant for
// filling a reusable batch tensor's backing slice without allocating.
func (s *Set) Fill(dst any, idx []int) error {
	const where = "dataset.Set.Fill"
	if s == nil {
		return argError(where, "s", "nil Set")
	}
	if err := s.checkIndex(where, idx); err != nil {
		return err
	}
	need := len(idx) * s.f
	switch d := dst.(type) {
	case []float64:
		if len(d) < need {
			return argError(where, "dst", "length %d, want at least %d (%d records x %d features)", len(d), need, len(idx), s.f)
		}
		for k, i := range idx {
			copy(d[k*s.f:(k+1)*s.f], s.x[i*s.f:(i+1)*s.f])
		}
	case []float32:
		if len(d) < need {
			return argError(where, "dst", "length %d, want at least %d (%d records x %d features)", len(d), need, len(idx), s.f)
		}
		for k, i := range idx {
			row := s.x[i*s.f : (i+1)*s.f]
			out := d[k*s.f : (k+1)*s.f]
			for j, v := range row {
				out[j] = float32(v)
			}
		}
	default:
		return argError(where, "dst", "type %T, want []float32 or []float64", dst)
	}
	return nil
}

// FillOneHot writes the labels of the records at idx as one-hot rows of
// Classes() values into the start of dst (a []float32 or []float64 of length
// at least len(idx)*Classes()), for conditioning a model on the class.
func (s *Set) FillOneHot(dst any, idx []int) error {
	const where = "dataset.Set.FillOneHot"
	if s == nil {
		return argError(where, "s", "nil Set")
	}
	if s.labels == nil {
		return argError(where, "s", "Set has no labels")
	}
	if err := s.checkIndex(where, idx); err != nil {
		return err
	}
	c := s.classes
	need := len(idx) * c
	switch d := dst.(type) {
	case []float64:
		if len(d) < need {
			return argError(where, "dst", "length %d, want at least %d (%d records x %d classes)", len(d), need, len(idx), c)
		}
		clear(d[:need])
		for k, i := range idx {
			d[k*c+s.labels[i]] = 1
		}
	case []float32:
		if len(d) < need {
			return argError(where, "dst", "length %d, want at least %d (%d records x %d classes)", len(d), need, len(idx), c)
		}
		clear(d[:need])
		for k, i := range idx {
			d[k*c+s.labels[i]] = 1
		}
	default:
		return argError(where, "dst", "type %T, want []float32 or []float64", dst)
	}
	return nil
}

// Binarize returns a copy of s whose values are 1 where the value is at
// least threshold and 0 elsewhere (for a Bernoulli likelihood). Labels and
// shape are kept.
func (s *Set) Binarize(threshold float64) (*Set, error) {
	const where = "dataset.Set.Binarize"
	if s == nil {
		return nil, argError(where, "s", "nil Set")
	}
	if math.IsNaN(threshold) {
		return nil, argError(where, "threshold", "NaN")
	}
	c := s.clone()
	c.x = make([]float64, len(s.x))
	for k, v := range s.x {
		if v >= threshold {
			c.x[k] = 1
		} else if math.IsNaN(v) {
			c.x[k] = v // missing stays missing
		}
	}
	return c, nil
}

// Scale returns a copy of s with every value multiplied by factor, which
// must be finite and non-zero. Scale(1.0/255) maps byte pixels to [0, 1].
func (s *Set) Scale(factor float64) (*Set, error) {
	const where = "dataset.Set.Scale"
	if s == nil {
		return nil, argError(where, "s", "nil Set")
	}
	if factor == 0 || math.IsNaN(factor) || math.IsInf(factor, 0) {
		return nil, argError(where, "factor", "%v, want finite and non-zero", factor)
	}
	c := s.clone()
	c.x = make([]float64, len(s.x))
	for k, v := range s.x {
		c.x[k] = v * factor
	}
	if err := checkFiniteOrMissing(where, c.x, s.f, s.missing > 0); err != nil { // overflow to Inf
		return nil, err
	}
	return c, nil
}

// checkFiniteOrMissing is checkFinite that, when missing is set, lets NaN
// (a missing entry) through.
func checkFiniteOrMissing(where string, x []float64, f int, missing bool) error {
	for k, v := range x {
		if math.IsInf(v, 0) || math.IsNaN(v) && !missing {
			return dataError(where, "record %d, feature %d: value %v is not finite", k/f, k%f, v)
		}
	}
	return nil
}
