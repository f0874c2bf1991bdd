package detect

import (
	"fmt"
	"math"
	"sort"

	"gonum.org/v1/gonum/stat"
)

// AUC returns the area under the ROC curve of a score that should be higher
// for positives than for negatives: the probability that a randomly chosen
// positive scores above a randomly chosen negative, a tie counting one half.
// It is computed from ranks as the Mann-Whitney statistic,
//
//	U = R_pos - n_pos(n_pos+1)/2,  AUC = U / (n_pos n_neg)
//
// where R_pos is the sum of the positives' ranks in the pooled sample, tied
// values sharing their mean rank (Hanley and McNeil 1982). It needs at least
// one positive and one negative and finite scores.
func AUC(pos, neg []float64) (float64, error) {
	if len(pos) == 0 || len(neg) == 0 {
		return math.NaN(), fmt.Errorf("AUC: need at least one positive and one negative, have %d and %d", len(pos), len(neg))
	}
	type item struct {
		v   float64
		pos bool
	}
	all := make([]item, 0, len(pos)+len(neg))
	for _, v := range pos {
		all = append(all, item{v, true})
	}
	for _, v := range neg {
		all = append(all, item{v, false})
	}
	for _, it := range all {
		if math.IsNaN(it.v) || math.IsInf(it.v, 0) {
			return math.NaN(), fmt.Errorf("AUC: score %v is not finite", it.v)
		}
	}
	sort.Slice(all, func(i, j int) bool { return all[i].v < all[j].v })
	var rankSum float64
	for i := 0; i < len(all); {
		j := i
		for j < len(all) && all[j].v == all[i].v {
			j++
		}
		// Records i..j-1 are tied; ranks are 1-based, so their mean rank
		// is ((i+1) + j) / 2.
		mid := float64(i+1+j) / 2
		for k := i; k < j; k++ {
			if all[k].pos {
				rankSum += mid
			}
		}
		i = j
	}
	n1, n0 := float64(len(pos)), float64(len(neg))
	u := rankSum - n1*(n1+1)/2
	return u / (n1 * n0), nil
}

// ROCCurve returns the points (false positive rate, true positive rate) of
// the ROC curve, one per distinct score, from (0, 0) to (1, 1). It uses
// gonum's stat.ROC.
func ROCCurve(pos, neg []float64) (fpr, tpr []float64) {
	y := make([]float64, 0, len(pos)+len(neg))
	classes := make([]bool, 0, len(pos)+len(neg))
	y = append(append(y, pos...), neg...)
	for range pos {
		classes = append(classes, true)
	}
	for range neg {
		classes = append(classes, false)
	}
	stat.SortWeightedLabeled(y, classes, nil)
	tpr, fpr, _ = stat.ROC(nil, y, classes, nil)
	return fpr, tpr
}

// Detection counts the outcomes of flagging records whose score exceeds a
// threshold, for one group of positives against the negatives.
type Detection struct {
	TP, FN int // positives flagged and missed
	FP, TN int // negatives flagged and passed
}

// Detect counts the records of pos and neg whose score is above threshold.
// (vae/alarm sets thresholds with a stated false-alarm rate.)
func Detect(pos, neg []float64, threshold float64) Detection {
	var d Detection
	for _, v := range pos {
		if v > threshold {
			d.TP++
		} else {
			d.FN++
		}
	}
	for _, v := range neg {
		if v > threshold {
			d.FP++
		} else {
			d.TN++
		}
	}
	return d
}

// DetectFlags counts the flagged records (true) among the positives and
// the negatives, for flags that come from a rule other than one threshold
// (for example Benjamini-Hochberg screening of batches).
func DetectFlags(pos, neg []bool) Detection {
	var d Detection
	for _, f := range pos {
		if f {
			d.TP++
		} else {
			d.FN++
		}
	}
	for _, f := range neg {
		if f {
			d.FP++
		} else {
			d.TN++
		}
	}
	return d
}

// Precision is TP / (TP + FP), the fraction of flags that are faults; NaN
// when nothing is flagged.
func (d Detection) Precision() float64 {
	if d.TP+d.FP == 0 {
		return math.NaN()
	}
	return float64(d.TP) / float64(d.TP+d.FP)
}

// Recall is TP / (TP + FN), the fraction of faulty records flagged; NaN
// without positives.
func (d Detection) Recall() float64 {
	if d.TP+d.FN == 0 {
		return math.NaN()
	}
	return float64(d.TP) / float64(d.TP+d.FN)
}

// FalsePositiveRate is FP / (FP + TN), the fraction of normal records
// flagged; NaN without negatives.
func (d Detection) FalsePositiveRate() float64 {
	if d.FP+d.TN == 0 {
		return math.NaN()
	}
	return float64(d.FP) / float64(d.FP+d.TN)
}
