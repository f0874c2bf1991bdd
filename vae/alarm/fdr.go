package alarm

import (
	"slices"

	"lowerbound.dev/internal/errs"
)

// BenjaminiHochberg runs the step-up procedure of Benjamini and Hochberg
// (1995) on m p-values at a target false discovery rate q: with the
// p-values sorted, p(1) <= ... <= p(m), it finds the largest k with
//
//	p(k) <= k q / m
//
// and flags the k records with the smallest p-values, that is every record
// with p <= k q / m. It returns the flags in the order of p and that
// cutoff, k q / m (0 when nothing is flagged). If the p-values of the
// normal records are independent or positively dependent (PRDS) and
// super-uniform, the expected fraction of flagged records that are normal
// is at most q m0 / m <= q, with m0 the number of normal records; conformal
// p-values of one batch against one calibration set qualify (Bates et al.
// 2023).
//
// Every p-value must be in [0, 1] (an error names the first that is not)
// and 0 < q < 1. An empty p is an error.
func BenjaminiHochberg(p []float64, q float64) (flags []bool, cutoff float64, err error) {
	const where = "alarm.BenjaminiHochberg"
	if !(q > 0 && q < 1) {
		return nil, 0, errs.Arg(where, "q", "%v, want 0 < q < 1", q)
	}
	if len(p) == 0 {
		return nil, 0, errs.Arg(where, "p", "no p-values")
	}
	for i, v := range p {
		if !(v >= 0 && v <= 1) {
			return nil, 0, errs.Arg(where, "p", "p-value %d is %v, want 0 <= p <= 1", i, v)
		}
	}
	flags, cutoff = bh(p, q)
	return flags, cutoff, nil
}

// bh is BenjaminiHochberg on checked arguments.
func bh(p []float64, q float64) ([]bool, float64) {
	m := len(p)
	sorted := slices.Clone(p)
	slices.Sort(sorted)
	k := 0
	for i := m; i >= 1; i-- {
		if sorted[i-1] <= line(i, q, m) {
			k = i
			break
		}
	}
	flags := make([]bool, m)
	if k == 0 {
		return flags, 0
	}
	cutoff := line(k, q, m)
	for i, v := range p {
		flags[i] = v <= cutoff
	}
	return flags, cutoff
}

// line is the Benjamini-Hochberg line k q / m, computed the same way for
// the search and the cutoff so that the two agree to the bit.
func line(k int, q float64, m int) float64 { return float64(k) * q / float64(m) }

// Screening is the result of Calibration.Screen for one batch.
type Screening struct {
	// PValues holds the conformal p-value of every score of the batch.
	PValues []float64
	// Flagged marks the records to look at.
	Flagged []bool
	// Count is the number of flagged records.
	Count int
	// Cutoff is the largest p-value flagged, k q / m (0 when none is).
	Cutoff float64
}

// Screen flags the records of one batch of scores (for example one day of
// a fleet) so that the false discovery rate, the expected fraction of the
// flagged records that are normal, is at most fdr: it computes the
// conformal p-value of every score against the calibration scores and runs
// Benjamini-Hochberg on them at level fdr (Bates, Candes, Lei, Romano and
// Sesia 2023, "Testing for outliers with conformal p-values"). The bound is
// fdr m0/m over the draw of the calibration and of the batch's normal
// records, assuming those are exchangeable with the calibration records;
// it says nothing about how many faulty records are missed.
//
// The smallest conformal p-value is 1/(n+1), so a batch of m records can
// flag k records only if 1/(n+1) <= k fdr / m: with few calibration scores
// and large batches, Screen flags nothing. A NaN score is an error that
// names its index; an empty batch is an error.
func (c *Calibration) Screen(scores []float64, fdr float64) (Screening, error) {
	const where = "alarm.Calibration.Screen"
	if err := c.check(where); err != nil {
		return Screening{}, err
	}
	if !(fdr > 0 && fdr < 1) {
		return Screening{}, errs.Arg(where, "fdr", "%v, want 0 < fdr < 1", fdr)
	}
	if len(scores) == 0 {
		return Screening{}, errs.Arg(where, "scores", "empty batch")
	}
	if err := checkScores(where, scores); err != nil {
		return Screening{}, err
	}
	p := make([]float64, len(scores))
	for i, s := range scores {
		p[i] = c.pvalue(s)
	}
	flags, cutoff := bh(p, fdr)
	n := 0
	for _, f := range flags {
		if f {
			n++
		}
	}
	return Screening{PValues: p, Flagged: flags, Count: n, Cutoff: cutoff}, nil
}
