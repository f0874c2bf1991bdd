package alarm

import (
	"math"
	"slices"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"

	"lowerbound.dev/internal/errs"
)

// KolmogorovSmirnov compares two samples: it returns the two-sample
// Kolmogorov-Smirnov statistic D, the largest distance between their
// empirical distribution functions (computed by gonum's
// stat.KolmogorovSmirnov), and the asymptotic p-value of the hypothesis
// that both come from one continuous distribution,
//
//	p = Q_KS((sqrt(ne) + 0.12 + 0.11/sqrt(ne)) D),   ne = n m / (n + m),
//
// where Q_KS is the tail of the Kolmogorov distribution (see KolmogorovQ)
// and the factor is the small-sample correction of Stephens (1970), as
// given in Press, Teukolsky, Vetterling and Flannery, Numerical Recipes
// (the Kolmogorov-Smirnov test, section 14.3 of the second edition, cited
// from memory), which gives it as accurate for ne of about 4 and more.
//
// The test assumes independent draws. Scores of consecutive records of a
// time series are correlated, which makes the p-value too small; read D,
// the size of the shift, alongside it. Ties (discrete scores) make the
// p-value conservative. The samples are not modified; a NaN is an error
// that names the sample and index; both must be non-empty.
func KolmogorovSmirnov(a, b []float64) (d, p float64, err error) {
	const where = "alarm.KolmogorovSmirnov"
	for _, s := range []struct {
		name string
		x    []float64
	}{{"a", a}, {"b", b}} {
		if len(s.x) == 0 {
			return math.NaN(), math.NaN(), errs.Arg(where, s.name, "empty sample")
		}
		for i, v := range s.x {
			if math.IsNaN(v) {
				return math.NaN(), math.NaN(), errs.Arg(where, s.name, "value %d is NaN", i)
			}
		}
	}
	d, p = ks(a, b)
	return d, p, nil
}

// ks is KolmogorovSmirnov on checked samples; sorted samples are used as
// they are.
func ks(a, b []float64) (d, p float64) {
	if !slices.IsSorted(a) {
		a = slices.Clone(a)
		slices.Sort(a)
	}
	if !slices.IsSorted(b) {
		b = slices.Clone(b)
		slices.Sort(b)
	}
	d = stat.KolmogorovSmirnov(a, nil, b, nil)
	n, m := float64(len(a)), float64(len(b))
	rt := math.Sqrt(n * m / (n + m))
	return d, KolmogorovQ((rt + 0.12 + 0.11/rt) * d)
}

// KolmogorovQ returns P(K > lambda) for the Kolmogorov distribution, the
// limit law of sqrt(n) times the one-sample Kolmogorov-Smirnov statistic
// (Kolmogorov 1933; Smirnov 1948):
//
//	Q(lambda) = 2 sum_{j>=1} (-1)^(j-1) exp(-2 j^2 lambda^2).
//
// Below lambda = 1.18 that series converges slowly and the equivalent
// theta-function form is summed instead,
//
//	1 - Q(lambda) = sqrt(2 pi)/lambda sum_{j>=1} exp(-(2j-1)^2 pi^2 / (8 lambda^2)),
//
// (the switch point, 1.18, follows Numerical Recipes' Kolmogorov-Smirnov
// distribution function, cited from memory). Q is 1 for lambda <= 0.
func KolmogorovQ(lambda float64) float64 {
	switch {
	case math.IsNaN(lambda):
		return math.NaN()
	case lambda <= 0:
		return 1
	case lambda < 1.18:
		y := -math.Pi * math.Pi / (8 * lambda * lambda)
		var s float64
		for j := 1; j <= 50; j++ {
			t := math.Exp(y * float64((2*j-1)*(2*j-1)))
			s += t
			if t <= 1e-17*s {
				break
			}
		}
		return math.Min(1, math.Max(0, 1-math.Sqrt(2*math.Pi)/lambda*s))
	}
	var s float64
	sign := 1.0
	for j := 1; j <= 100; j++ {
		t := math.Exp(-2 * float64(j*j) * lambda * lambda)
		s += sign * t
		if t <= 1e-17*math.Abs(s) {
			break
		}
		sign = -sign
	}
	return math.Min(1, math.Max(0, 2*s))
}

// ClopperPearson returns the exact (Clopper and Pearson 1934) two-sided
// confidence interval for a binomial proportion after x successes in n
// trials, from quantiles of the Beta distribution (gonum distuv.Beta):
//
//	lo = Beta(x, n-x+1) quantile at (1-confidence)/2     (0 when x = 0)
//	hi = Beta(x+1, n-x) quantile at (1+confidence)/2     (1 when x = n)
//
// It covers the true proportion with probability at least confidence for
// every proportion: it is conservative. It needs n >= 1, 0 <= x <= n and
// 0 < confidence < 1.
func ClopperPearson(x, n int, confidence float64) (lo, hi float64, err error) {
	const where = "alarm.ClopperPearson"
	switch {
	case n < 1:
		return math.NaN(), math.NaN(), errs.Arg(where, "n", "%d trials, want >= 1", n)
	case x < 0 || x > n:
		return math.NaN(), math.NaN(), errs.Arg(where, "x", "%d successes in %d trials", x, n)
	case !(confidence > 0 && confidence < 1):
		return math.NaN(), math.NaN(), errs.Arg(where, "confidence", "%v, want 0 < confidence < 1", confidence)
	}
	a := 1 - confidence
	lo, hi = 0, 1
	if x > 0 {
		lo = distuv.Beta{Alpha: float64(x), Beta: float64(n - x + 1)}.Quantile(a / 2)
	}
	if x < n {
		hi = distuv.Beta{Alpha: float64(x + 1), Beta: float64(n - x)}.Quantile(1 - a/2)
	}
	return lo, hi, nil
}

// Drift compares a recent window of scores with the calibration scores.
type Drift struct {
	// Window is the number of scores in the window.
	Window int
	// KS is the two-sample Kolmogorov-Smirnov statistic between the
	// window and the calibration scores: the largest gap between their
	// distribution functions, between 0 and 1.
	KS float64
	// KSPValue is its asymptotic p-value (see KolmogorovSmirnov); small
	// values say the window's scores are not distributed like the
	// calibration scores.
	KSPValue float64
	// Alarms is the number of window scores above the threshold and Rate
	// the fraction Alarms/Window.
	Alarms int
	Rate   float64
	// RateLow and RateHigh bound the window's false-alarm rate: the
	// Clopper-Pearson interval at Confidence, for a window of normal
	// records (as if independent).
	RateLow, RateHigh float64
	// Alpha is the calibration's false-alarm rate and Confidence that of
	// the interval.
	Alpha, Confidence float64
}

// RateAboveAlpha reports whether the whole interval for the false-alarm
// rate lies above alpha: the threshold no longer keeps its promise on
// this window, and the calibration (or the model) needs renewing.
func (d Drift) RateAboveAlpha() bool { return d.RateLow > d.Alpha }

// Drift checks a window of recent scores, meant to be of normal records,
// against the calibration: the two-sample Kolmogorov-Smirnov statistic and
// p-value between the window and the calibration scores, and the fraction
// of the window that alarms with its Clopper-Pearson interval at
// confidence (0.95 when zero). If the window is exchangeable with the
// calibration, the KS p-value is (asymptotically) uniform and the
// false-alarm rate is at most alpha.
//
// A window that holds faults will show drift by design; screen it first or
// read the result with that in mind. A NaN score is an error that names
// its index; the window must not be empty.
func (c *Calibration) Drift(window []float64, confidence float64) (Drift, error) {
	const where = "alarm.Calibration.Drift"
	if err := c.check(where); err != nil {
		return Drift{}, err
	}
	if confidence == 0 {
		confidence = 0.95
	}
	if !(confidence > 0 && confidence < 1) {
		return Drift{}, errs.Arg(where, "confidence", "%v, want 0 < confidence < 1 (0 means 0.95)", confidence)
	}
	if len(window) == 0 {
		return Drift{}, errs.Arg(where, "window", "no scores")
	}
	if err := checkScores(where, window); err != nil {
		return Drift{}, err
	}
	d := Drift{Window: len(window), Alpha: c.alpha, Confidence: confidence}
	d.KS, d.KSPValue = ks(window, c.scores)
	for _, s := range window {
		if s > c.threshold {
			d.Alarms++
		}
	}
	d.Rate = float64(d.Alarms) / float64(d.Window)
	var err error
	if d.RateLow, d.RateHigh, err = ClopperPearson(d.Alarms, d.Window, confidence); err != nil {
		return Drift{}, err
	}
	return d, nil
}
