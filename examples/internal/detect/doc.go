// Package detect measures how well an anomaly score separates faulty
// records (positives) from normal ones (negatives), for the example
// programs. Higher scores mean "less normal".
//
//	AUC(pos, neg)              area under the ROC curve, from ranks (the
//	                           Mann-Whitney statistic; ties count one half)
//	ROCCurve(pos, neg)         the ROC curve's points, via gonum stat.ROC
//	Quantile(xs, q)            empirical quantile, to set an alarm threshold
//	                           from the scores of normal records
//	Detect(pos, neg, th)       counts of records flagged (score > th) and
//	                           passed, as a Detection with Precision, Recall
//	                           and FalsePositiveRate
//
// A typical use sets the threshold at a high quantile of held-out normal
// scores and reports the detection at that threshold with the AUC:
//
//	th, err := detect.Quantile(valScores, 0.99)
//	d := detect.Detect(faultScores, normalScores, th)
//	auc, err := detect.AUC(faultScores, normalScores)
//	fmt.Println(d.Precision(), d.Recall(), auc)
//
// AUC and Quantile return an error for empty or invalid input; rates that
// are undefined (no flags, no positives, no negatives) are NaN.
package detect
