package alarm

import (
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
)

// TestBenjaminiHochbergHandWorked checks the procedure against examples
// worked by hand from its definition (Benjamini and Hochberg 1995: find the
// largest k with p(k) <= k q/m, reject the k smallest).
func TestBenjaminiHochbergHandWorked(t *testing.T) {
	for _, c := range []struct {
		name   string
		p      []float64
		q      float64
		want   []bool
		cutoff float64
	}{
		// The 15 p-values of the worked example in Benjamini and Hochberg
		// (1995; a thrombolysis trial, values from memory), at q = 0.05. The lines k q/m =
		// k/300: 0.00333, 0.00667, 0.01, 0.01333, 0.01667, ...; p(4) =
		// 0.0095 <= 0.01333 and p(k) > k/300 for every k >= 5 (p(5) =
		// 0.0201 > 0.01667, p(9) = 0.0459 > 0.03, ...), so k = 4: the four
		// smallest are rejected (four is also the paper's count, from
		// memory, against three for Bonferroni at 0.05/15).
		{"BH 1995 example",
			[]float64{0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1},
			0.05,
			[]bool{true, true, true, true, false, false, false, false, false, false, false, false, false, false, false},
			4 * 0.05 / 15},
		// Step-up, in shuffled order, m = 5, q = 0.1: lines 0.02, 0.04,
		// 0.06, 0.08, 0.1. Sorted: 0.01 <= 0.02; 0.05 > 0.04; 0.055 <=
		// 0.06; 0.079 <= 0.08; 0.5 > 0.1. The largest k is 4, so 0.05 is
		// rejected although it is above its own line.
		{"step-up",
			[]float64{0.5, 0.055, 0.01, 0.079, 0.05},
			0.1,
			[]bool{false, true, true, true, true},
			4 * 0.1 / 5},
		// Ties, m = 4, q = 0.05: lines 0.0125, 0.025, 0.0375, 0.05; sorted
		// 0.01, 0.01, 0.01, 0.9: k = 3, all three tied values rejected.
		{"ties",
			[]float64{0.01, 0.9, 0.01, 0.01},
			0.05,
			[]bool{true, false, true, true},
			3 * 0.05 / 4},
		// Nothing under its line: m = 3, q = 0.1, lines 0.0333, 0.0667,
		// 0.1; p = 0.04, 0.07, 0.2 are all above.
		{"none", []float64{0.2, 0.04, 0.07}, 0.1, []bool{false, false, false}, 0},
		// Everything: the largest p-value 0.1 <= q = 0.1.
		{"all", []float64{0.1, 0.01, 0.05}, 0.1, []bool{true, true, true}, 0.1},
	} {
		got, cutoff, err := BenjaminiHochberg(c.p, c.q)
		if err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		if !slices.Equal(got, c.want) || math.Abs(cutoff-c.cutoff) > 1e-15 {
			t.Errorf("%s: flags %v cutoff %v; want %v, %v", c.name, got, cutoff, c.want, c.cutoff)
		}
	}
}

func TestBenjaminiHochbergErrors(t *testing.T) {
	for name, c := range map[string]struct {
		p []float64
		q float64
	}{
		"empty":    {nil, 0.1},
		"q 0":      {[]float64{0.1}, 0},
		"q 1":      {[]float64{0.1}, 1},
		"p NaN":    {[]float64{0.1, math.NaN()}, 0.1},
		"p > 1":    {[]float64{1.5}, 0.1},
		"p < 0":    {[]float64{-0.1}, 0.1},
		"q is NaN": {[]float64{0.1}, math.NaN()},
	} {
		if _, _, err := BenjaminiHochberg(c.p, c.q); !errors.Is(err, ErrInvalidArgument) {
			t.Errorf("%s: err = %v, want ErrInvalidArgument", name, err)
		}
	}
}

// TestScreenFDRBySimulation checks the theorem of Bates, Candes, Lei,
// Romano and Sesia (2023): Benjamini-Hochberg at level q on the conformal
// p-values of a batch (m0 normal records exchangeable with the n
// calibration records, m1 outliers) keeps the false discovery rate,
// E[V / max(R, 1)], at most q m0 / m. Scores come from gonum distuv
// normals; the outliers are shifted by 3.5 standard deviations. The mean
// false discovery proportion over the repetitions is compared with the
// bound plus 3.5 standard errors of that mean (estimated from the
// repetitions). The global-null case (no outliers) checks P(any flag) <= q,
// which is the FDR there. The outlier case also checks that half of the
// outliers or more are found, so that a procedure that never flags cannot
// pass.
func TestScreenFDRBySimulation(t *testing.T) {
	const reps, n, m, q = 1000, 999, 200, 0.1
	for _, c := range []struct {
		name     string
		outliers int
	}{{"20 outliers", 20}, {"global null", 0}} {
		normal := distuv.Normal{Mu: 0, Sigma: 1, Src: rand.NewPCG(7, uint64(c.outliers))}
		shifted := distuv.Normal{Mu: 3.5, Sigma: 1, Src: rand.NewPCG(8, uint64(c.outliers))}
		fdp := make([]float64, reps)
		var power float64
		cal := make([]float64, n)
		batch := make([]float64, m)
		for r := range reps {
			for i := range cal {
				cal[i] = normal.Rand()
			}
			cb, err := Calibrate(cal, 0.1)
			if err != nil {
				t.Fatal(err)
			}
			for i := range batch {
				if i < c.outliers {
					batch[i] = shifted.Rand()
				} else {
					batch[i] = normal.Rand()
				}
			}
			s, err := cb.Screen(batch, q)
			if err != nil {
				t.Fatal(err)
			}
			var v, found int
			for i, f := range s.Flagged {
				switch {
				case f && i >= c.outliers:
					v++
				case f:
					found++
				}
			}
			if s.Count > 0 {
				fdp[r] = float64(v) / float64(s.Count)
			}
			if c.outliers > 0 {
				power += float64(found) / float64(c.outliers) / reps
			}
		}
		mean, sd := stat.MeanStdDev(fdp, nil)
		bound := q * float64(m-c.outliers) / m
		tol := 3.5 * sd / math.Sqrt(reps)
		t.Logf("%s: FDR %.4f (bound %.4f + %.4f), power %.3f", c.name, mean, bound, tol, power)
		if mean > bound+tol {
			t.Errorf("%s: FDR %.4f above q m0/m = %.4f (+ %.4f)", c.name, mean, bound, tol)
		}
		if c.outliers > 0 && power < 0.5 {
			t.Errorf("%s: found %.3f of the outliers on average, want >= 0.5", c.name, power)
		}
	}
}

// TestScreenResolution checks the documented limit: the smallest conformal
// p-value is 1/(n+1), so a batch can flag k records only if 1/(n+1) <=
// k q/m. With n = 19 (p >= 0.05), m = 100 and q = 0.1, k would have to be
// 50 or more; five extreme scores are not enough, fifty are.
func TestScreenResolution(t *testing.T) {
	cal := make([]float64, 19)
	for i := range cal {
		cal[i] = float64(i)
	}
	c, err := Calibrate(cal, 0.1)
	if err != nil {
		t.Fatal(err)
	}
	batch := make([]float64, 100)
	for extreme, want := range map[int]int{5: 0, 50: 50} {
		for i := range batch {
			batch[i] = 5
			if i < extreme {
				batch[i] = 1000
			}
		}
		s, err := c.Screen(batch, 0.1)
		if err != nil {
			t.Fatal(err)
		}
		if s.Count != want {
			t.Errorf("%d extreme scores: %d flagged, want %d", extreme, s.Count, want)
		}
		if s.PValues[0] != 1.0/20 {
			t.Errorf("p-value of an extreme score %v, want 1/20", s.PValues[0])
		}
	}
	if _, err := c.Screen([]float64{1, math.NaN()}, 0.1); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("NaN score: %v", err)
	}
	if _, err := c.Screen(nil, 0.1); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("empty batch: %v", err)
	}
	if _, err := c.Screen([]float64{1}, 0); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("fdr 0: %v", err)
	}
}
