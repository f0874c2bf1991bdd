// Package detect measures how well an anomaly score separates faulty
// records (positives) from normal ones (negatives), for the example
// programs. Higher scores mean "less normal".
//
//	AUC(pos, neg)              area under the ROC curve, from ranks (the
//	                           Mann-Whitney statistic; ties count one half)
//	ROCCurve(pos, neg)         the ROC curve's points, via gonum stat.ROC
//	Detect(pos, neg, th)       counts of records flagged (score > th) and
//	                           passed, as a Detection with Precision, Recall
//	                           and FalsePositiveRate
//	DetectFlags(pos, neg)      the same counts from flags set by any rule
//
// Thresholds come from lowerbound.dev/vae/alarm, which gives them a stated
// false-alarm rate; a typical use reports the detection at the threshold
// with the AUC:
//
//	cal, err := alarm.Calibrate(calScores, 0.01)
//	d := detect.Detect(faultScores, normalScores, cal.Threshold())
//	auc, err := detect.AUC(faultScores, normalScores)
//	fmt.Println(d.Precision(), d.Recall(), auc)
//
// AUC returns an error for empty or invalid input; rates that are
// undefined (no flags, no positives, no negatives) are NaN.
package detect
