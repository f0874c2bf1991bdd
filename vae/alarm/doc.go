// Package alarm turns anomaly scores into alarms with a stated false-alarm
// rate, screens batches with a stated false discovery rate, and checks
// whether recent scores still look like the ones the alarms were
// calibrated on. It works on plain float64 scores (higher means less
// normal), from vae.Model.Score or any other scorer, and depends only on
// gonum.
//
// # Calibration
//
// Hold out n records of normal operation that the model was neither
// trained on nor chosen with, score them, and call Calibrate with the
// false-alarm rate alpha you can live with:
//
//	cal, err := alarm.Calibrate(calScores, 0.01)
//	flags, err := cal.Flags(newScores)      // score > cal.Threshold()
//	p, err := cal.PValues(newScores)        // conformal p-values
//
// This is split conformal prediction (Vovk, Gammerman and Shafer 2005,
// "Algorithmic Learning in a Random World"; Angelopoulos and Bates 2021,
// "A gentle introduction to conformal prediction and distribution-free
// uncertainty quantification"). The threshold is the k-th smallest
// calibration score with k = ceil((n+1)(1-alpha)). If a new normal record
// is exchangeable with the calibration records (independent draws from the
// same operation are), the probability that it alarms is at most alpha,
// and at least alpha - 1/(n+1) when scores have no ties, whatever the model
// and whatever the distribution of the scores. That needs n >=
// RecordsNeeded(alpha) (99 for 1%); Calibrate says so when n is smaller.
//
// The guarantee is an average over the draw of the calibration set. For
// one calibration set, the false-alarm rate is itself random: with
// continuous scores it is Beta(n+1-k, k) distributed (Vovk 2012,
// "Conditional validity of inductive conformal predictors"; also in
// Angelopoulos and Bates 2021), with mean (n+1-k)/(n+1) and a spread of
// about sqrt(alpha(1-alpha)/n). A few thousand calibration scores make the
// rate close to alpha for the calibration in hand.
//
// The conformal p-value of a new score s is (1 + #{calibration >= s})/(n+1)
// (Bates, Candes, Lei, Romano and Sesia 2023, "Testing for outliers with
// conformal p-values", Annals of Statistics). For a normal record it is
// super-uniform, P(p <= t) <= t, and a score alarms exactly when p <= alpha.
// Its smallest value is 1/(n+1).
//
// # Batches and the false discovery rate
//
// When a batch of records is screened at once (a day of a fleet, say),
// Calibration.Screen runs the Benjamini-Hochberg (1995) procedure on the
// batch's conformal p-values: the expected fraction of flagged records that
// are normal is at most the target (Bates et al. 2023 prove that conformal
// p-values of one batch satisfy the positive dependence BH needs).
// BenjaminiHochberg runs the procedure on any p-values.
//
// # Drift
//
// The guarantee lasts only as long as normal operation looks like the
// calibration records. Calibration.Drift compares a recent window of
// scores of normal records with the calibration scores: the two-sample
// Kolmogorov-Smirnov statistic (gonum stat.KolmogorovSmirnov) with its
// asymptotic p-value (Kolmogorov's limit law with the correction of
// Stephens 1970), and the observed false-alarm rate with its exact
// Clopper-Pearson (1934) interval. A rate whose interval lies above alpha
// (Drift.RateAboveAlpha) means: recalibrate on recent normal records, or
// retrain. KolmogorovSmirnov, KolmogorovQ and ClopperPearson are exported.
//
// Scores of consecutive records of a time series are correlated, so they
// are not exchangeable: the guarantee then holds only approximately (for a
// stable, weakly dependent process the gap is small when the calibration
// period is long; see Barber, Candes, Ramdas and Tibshirani 2023,
// "Conformal prediction beyond exchangeability"). The KS p-value and the
// binomial interval, which assume independent records, overstate their
// precision: with thousands of correlated records a KS p-value is tiny for
// shifts too small to matter. Read the KS statistic (the size of the
// shift) and the observed rate against alpha, not the p-value alone.
//
// # Storing a calibration
//
// A Calibration marshals to JSON with alpha, n, the rank, the threshold, a
// summary of the scores and all n sorted scores (so that p-values can be
// computed later, exactly). Put stores it in a model's checkpoint metadata
// under MetadataKey and Get reads it back:
//
//	err := alarm.Put(model, cal)   // before model.Save
//	cal, err := alarm.Get(loaded)  // after vae.Load
//
// # Errors
//
// Bad arguments (alpha outside (0, 1), a NaN score, an empty batch) return
// an error that names the function, the argument and the index of the bad
// score, and wraps ErrInvalidArgument; too few calibration scores also wrap
// ErrTooFew. A stored calibration that does not check out wraps
// ErrBadCalibration, a missing one ErrNoCalibration.
package alarm
