// Package plots draws the few PNG charts the example programs write, as a
// thin layer over gonum.org/v1/plot:
//
//	Histograms(path, groups, opt)  overlaid step-outline histograms over
//	                               shared bins, each normalised to fractions
//	                               of its own group, with named vertical
//	                               markers (thresholds); optionally on a
//	                               signed log axis, sign(x) log10(1 + |x|),
//	                               for heavy-tailed scores
//	Curves(path, curves, opt)      named lines with a legend, an optional
//	                               dashed diagonal and named points, for ROC
//	                               curves with their operating points
//
// Colours come from gonum/plot's palette unless a Group or Curve sets one,
// so a caller can keep one colour per category across its plots. The image
// format follows the file extension (.png, .svg, .pdf).
package plots
