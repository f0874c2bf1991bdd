package detect_test

import (
	"fmt"

	"lowerbound.dev/examples/internal/detect"
)

// The numbers below can be counted by hand: of the 9 (fault, normal) pairs
// the fault scores higher in 7 and ties in 1, so AUC = 7.5/9; above the
// threshold 0.4 are two faults and one normal.
func Example() {
	faults := []float64{0.9, 0.8, 0.4}
	normal := []float64{0.7, 0.4, 0.1}
	auc, err := detect.AUC(faults, normal)
	if err != nil {
		fmt.Println(err)
		return
	}
	th := 0.4
	d := detect.Detect(faults, normal, th)
	fmt.Printf("AUC %.3f, threshold %v\n", auc, th)
	fmt.Printf("%+v: precision %.3f, recall %.3f, false positive rate %.3f\n", d, d.Precision(), d.Recall(), d.FalsePositiveRate())
	// Output:
	// AUC 0.833, threshold 0.4
	// {TP:2 FN:1 FP:1 TN:2}: precision 0.667, recall 0.667, false positive rate 0.333
}
