package detect

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/integrate"
)

func TestAUCHandCounted(t *testing.T) {
	// Positives {0.9, 0.8, 0.4}, negatives {0.7, 0.4, 0.1}. Count the 9
	// (positive, negative) pairs in which the positive scores higher, a tie
	// counting one half:
	//   0.9 beats 0.7, 0.4, 0.1          -> 3
	//   0.8 beats 0.7, 0.4, 0.1          -> 3
	//   0.4 loses to 0.7, ties 0.4, beats 0.1 -> 0 + 0.5 + 1 = 1.5
	// U = 7.5, so AUC = U / (3 * 3) = 7.5 / 9 = 0.8333...
	// reference: the Mann-Whitney U relation AUC = U / (n1 n0), Hanley and
	// McNeil 1982.
	got, err := AUC([]float64{0.9, 0.8, 0.4}, []float64{0.7, 0.4, 0.1})
	if err != nil {
		t.Fatal(err)
	}
	if want := 7.5 / 9; math.Abs(got-want) > 1e-15 {
		t.Errorf("AUC = %v, want %v", got, want)
	}

	// Perfect separation and its reverse, worked out by hand: 1 and 0.
	if got, _ := AUC([]float64{5, 6}, []float64{1, 2, 3}); got != 1 {
		t.Errorf("separated AUC = %v, want 1", got)
	}
	if got, _ := AUC([]float64{1, 2}, []float64{5, 6, 7}); got != 0 {
		t.Errorf("reversed AUC = %v, want 0", got)
	}
	// All scores equal: every pair is a tie, AUC = 1/2.
	if got, _ := AUC([]float64{3, 3}, []float64{3, 3, 3}); got != 0.5 {
		t.Errorf("all-tied AUC = %v, want 0.5", got)
	}
}

// TestAUCMatchesROCTrapezoid checks the rank statistic against an
// independent computation: the area under the ROC curve from gonum's
// stat.ROC, integrated with gonum's integrate.Trapezoidal. With ties the
// trapezoid spans the tied block diagonally, which is the half credit of
// the mid-rank statistic, so the two agree to rounding. Scores are rounded
// to one decimal so that ties are common.
func TestAUCMatchesROCTrapezoid(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 0))
	for trial := range 20 {
		n1, n0 := 1+rng.IntN(60), 1+rng.IntN(80)
		shift := rng.Float64() * 2
		pos, neg := make([]float64, n1), make([]float64, n0)
		for i := range pos {
			pos[i] = math.Round(10*(rng.NormFloat64()+shift)) / 10
		}
		for i := range neg {
			neg[i] = math.Round(10*rng.NormFloat64()) / 10
		}
		got, err := AUC(pos, neg)
		if err != nil {
			t.Fatal(err)
		}
		fpr, tpr := ROCCurve(pos, neg)
		// reference: gonum stat.ROC + integrate.Trapezoidal.
		want := integrate.Trapezoidal(fpr, tpr)
		if math.Abs(got-want) > 1e-12 {
			t.Errorf("trial %d (n1 %d, n0 %d): rank AUC %v, trapezoid %v", trial, n1, n0, got, want)
		}
		// reference: the definition, P(pos > neg) + P(pos == neg)/2 over
		// all pairs, counted directly.
		var pairs float64
		for _, p := range pos {
			for _, n := range neg {
				switch {
				case p > n:
					pairs++
				case p == n:
					pairs += 0.5
				}
			}
		}
		if def := pairs / float64(n1*n0); math.Abs(got-def) > 1e-12 {
			t.Errorf("trial %d: rank AUC %v, pairwise count %v", trial, got, def)
		}
	}
}

func TestAUCErrors(t *testing.T) {
	if _, err := AUC(nil, []float64{1}); err == nil {
		t.Error("no positives: want an error")
	}
	if _, err := AUC([]float64{1}, nil); err == nil {
		t.Error("no negatives: want an error")
	}
	if _, err := AUC([]float64{math.NaN()}, []float64{1}); err == nil {
		t.Error("NaN score: want an error")
	}
}

func TestDetect(t *testing.T) {
	// Threshold 5 (flag when score > 5): positives {9, 6, 5, 1} give TP 2
	// (9, 6) and FN 2 (5 is not above the threshold); negatives {7, 2, 3}
	// give FP 1 and TN 2. Precision 2/3, recall 2/4, FPR 1/3, by hand.
	d := Detect([]float64{9, 6, 5, 1}, []float64{7, 2, 3}, 5)
	if d != (Detection{TP: 2, FN: 2, FP: 1, TN: 2}) {
		t.Fatalf("Detect = %+v", d)
	}
	for _, c := range []struct {
		name      string
		got, want float64
	}{
		{"precision", d.Precision(), 2.0 / 3},
		{"recall", d.Recall(), 0.5},
		{"false positive rate", d.FalsePositiveRate(), 1.0 / 3},
	} {
		if math.Abs(c.got-c.want) > 1e-15 {
			t.Errorf("%s = %v, want %v", c.name, c.got, c.want)
		}
	}
	empty := Detection{}
	if !math.IsNaN(empty.Precision()) || !math.IsNaN(empty.Recall()) || !math.IsNaN(empty.FalsePositiveRate()) {
		t.Error("empty counts: want NaN rates")
	}
}

func TestDetectFlags(t *testing.T) {
	// By hand: positives flagged {yes, no, yes} give TP 2, FN 1; negatives
	// {no, yes, no, no} give FP 1, TN 3.
	d := DetectFlags([]bool{true, false, true}, []bool{false, true, false, false})
	if d != (Detection{TP: 2, FN: 1, FP: 1, TN: 3}) {
		t.Errorf("DetectFlags = %+v", d)
	}
	// The same as Detect when the flags come from one threshold.
	pos, neg := []float64{9, 6, 5, 1}, []float64{7, 2, 3}
	above := func(xs []float64) []bool {
		out := make([]bool, len(xs))
		for i, x := range xs {
			out[i] = x > 5
		}
		return out
	}
	if a, b := DetectFlags(above(pos), above(neg)), Detect(pos, neg, 5); a != b {
		t.Errorf("DetectFlags %+v, Detect %+v", a, b)
	}
}
