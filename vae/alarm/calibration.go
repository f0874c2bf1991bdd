package alarm

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"slices"
	"sort"

	"gonum.org/v1/gonum/stat"

	"lowerbound.dev/internal/errs"
)

// ErrInvalidArgument is wrapped by every error that reports a bad argument:
// alpha outside (0, 1), a NaN score, an empty batch. It is the SDK's one
// sentinel for bad arguments (vae.ErrInvalidArgument and
// layers.ErrInvalidArgument hold the same value).
var ErrInvalidArgument = errs.InvalidArgument

// ErrTooFew is wrapped (together with ErrInvalidArgument) by the error
// Calibrate returns when there are too few calibration scores for the
// false-alarm rate asked for; the message says how many are needed.
var ErrTooFew = errors.New("too few calibration scores")

// ErrBadCalibration is wrapped by every error that reports a stored
// calibration that cannot be used: malformed JSON, unsorted or non-finite
// scores, a threshold that does not follow from the scores.
var ErrBadCalibration = errors.New("bad calibration")

// rankTolerance absorbs the rounding of (n+1)(1-alpha) in float64: a
// product within this relative distance of an integer counts as that
// integer, so that a decimal alpha such as 0.01 (not exactly representable)
// gives the rank exact arithmetic gives. float64 rounding is about 1e-16
// relative, far inside it.
const rankTolerance = 1e-12

// rank returns ceil((n+1)(1-alpha)), the 1-based rank of the calibration
// score that is the threshold.
func rank(n int, alpha float64) int {
	x := float64(n+1) * (1 - alpha)
	k := int(math.Ceil(x * (1 - rankTolerance)))
	return max(k, 1)
}

func checkAlpha(where string, alpha float64) error {
	if !(alpha > 0 && alpha < 1) {
		return errs.Arg(where, "alpha", "%v, want 0 < alpha < 1", alpha)
	}
	return nil
}

// RecordsNeeded returns the fewest calibration scores that Calibrate
// accepts for a false-alarm rate alpha: the smallest n with
// ceil((n+1)(1-alpha)) <= n, which is ceil(1/alpha - 1) (99 for alpha =
// 1%, 999 for 0.1%).
//
// With exactly that many the threshold is the largest calibration score.
// More records buy a more stable threshold: conditional on the calibration
// set, the false-alarm rate is Beta distributed with a spread of about
// sqrt(alpha(1-alpha)/n) (see the package documentation).
func RecordsNeeded(alpha float64) (int, error) {
	if err := checkAlpha("alarm.RecordsNeeded", alpha); err != nil {
		return 0, err
	}
	guess := math.Floor(1/alpha - 1)
	if guess > 1e15 {
		return 0, errs.Arg("alarm.RecordsNeeded", "alpha", "%v is too small: it needs about %.3g calibration scores", alpha, guess)
	}
	// The guess is within one of the answer; step to the exact rule.
	n := max(int(guess)-2, 1)
	for rank(n, alpha) > n {
		n++
	}
	return n, nil
}

// Calibration turns anomaly scores into alarms with a stated false-alarm
// rate. Build one with Calibrate from the scores of held-out normal records;
// it holds the sorted calibration scores, so it can give a conformal
// p-value for any new score, and it serialises to JSON (MarshalJSON) so that
// it can travel with a model's checkpoint (Put, Get).
//
// A Calibration never changes after it is built and is safe for concurrent
// use. The zero Calibration holds no scores: its methods that return an
// error report ErrBadCalibration, and its threshold means nothing.
type Calibration struct {
	alpha     float64
	k         int       // 1-based rank of the threshold in scores
	scores    []float64 // sorted ascending, all finite
	threshold float64   // scores[k-1]
}

// Calibrate builds the split-conformal calibration (Vovk, Gammerman and
// Shafer 2005; Angelopoulos and Bates 2021) for a false-alarm rate alpha
// from the scores of n held-out normal records: records the model was not
// trained on and that were not used to choose it (for example to pick the
// best epoch). Higher scores mean less normal.
//
// The threshold is the k-th smallest calibration score with
// k = ceil((n+1)(1-alpha)), and a record alarms when its score is above
// the threshold. If the new record and the calibration records are
// exchangeable (for example independent draws of normal operation), then
//
//	alpha - 1/(n+1) <= P(alarm) <= alpha
//
// over the draw of both; the upper bound needs nothing else, the lower
// bound needs scores without ties. Calibrate needs n >= RecordsNeeded(alpha);
// with fewer it returns an error wrapping ErrTooFew that says how many are
// needed. Every score must be finite; a NaN or infinity is an error that
// names its index. scores is not modified.
func Calibrate(scores []float64, alpha float64) (*Calibration, error) {
	const where = "alarm.Calibrate"
	if err := checkAlpha(where, alpha); err != nil {
		return nil, err
	}
	if len(scores) == 0 {
		return nil, errs.Arg(where, "scores", "no calibration scores")
	}
	for i, s := range scores {
		if math.IsNaN(s) || math.IsInf(s, 0) {
			return nil, errs.Arg(where, "scores", "score %d is %v; calibration scores must be finite", i, s)
		}
	}
	n := len(scores)
	k := rank(n, alpha)
	if k > n {
		need, err := RecordsNeeded(alpha)
		if err != nil {
			return nil, err
		}
		return nil, fmt.Errorf("%s: scores: %d calibration scores cannot give a false-alarm rate of %v: at least %d are needed: %w (%w)",
			where, n, alpha, need, ErrTooFew, ErrInvalidArgument)
	}
	sorted := slices.Clone(scores)
	slices.Sort(sorted)
	return &Calibration{alpha: alpha, k: k, scores: sorted, threshold: sorted[k-1]}, nil
}

// Alpha returns the false-alarm rate the calibration was built for.
func (c *Calibration) Alpha() float64 { return c.alpha }

// N returns the number of calibration scores.
func (c *Calibration) N() int { return len(c.scores) }

// Rank returns k = ceil((n+1)(1-alpha)): the threshold is the k-th smallest
// calibration score (1-based).
func (c *Calibration) Rank() int { return c.k }

// Threshold returns the alarm threshold: a score above it alarms.
func (c *Calibration) Threshold() float64 { return c.threshold }

// Scores returns a copy of the calibration scores, sorted ascending.
func (c *Calibration) Scores() []float64 { return slices.Clone(c.scores) }

// Guarantee returns the interval [alpha - 1/(n+1), alpha] that holds, over
// the draw of the calibration and the new record, the probability that a
// normal record exchangeable with the calibration records alarms (the
// lower end assumes scores without ties). Exactly, for continuous scores,
// that probability is (n + 1 - k)/(n + 1).
func (c *Calibration) Guarantee() (lo, hi float64) {
	return math.Max(0, c.alpha-1/float64(len(c.scores)+1)), c.alpha
}

// count returns #{calibration scores >= s}.
func (c *Calibration) count(s float64) int {
	return len(c.scores) - sort.SearchFloat64s(c.scores, s)
}

func (c *Calibration) pvalue(s float64) float64 {
	return float64(1+c.count(s)) / float64(len(c.scores)+1)
}

// PValue returns the conformal p-value of a new score s,
//
//	p(s) = (1 + #{i : calibration score i >= s}) / (n + 1),
//
// the marginal conformal p-value of Bates, Candes, Lei, Romano and Sesia
// (2023). For a normal record exchangeable with the calibration records,
// P(p <= t) <= t for every t in [0, 1] (it is super-uniform). A score
// alarms exactly when its p-value is at most alpha. p lies in
// [1/(n+1), 1]: no p-value is smaller than 1/(n+1), however extreme the
// score. s may be infinite; NaN is an error.
func (c *Calibration) PValue(s float64) (float64, error) {
	if err := c.check("alarm.Calibration.PValue"); err != nil {
		return math.NaN(), err
	}
	if math.IsNaN(s) {
		return math.NaN(), errs.Arg("alarm.Calibration.PValue", "s", "score is NaN")
	}
	return c.pvalue(s), nil
}

// PValues returns the conformal p-value (see PValue) of every score; a NaN
// score is an error that names its index.
func (c *Calibration) PValues(scores []float64) ([]float64, error) {
	if err := c.check("alarm.Calibration.PValues"); err != nil {
		return nil, err
	}
	if err := checkScores("alarm.Calibration.PValues", scores); err != nil {
		return nil, err
	}
	p := make([]float64, len(scores))
	for i, s := range scores {
		p[i] = c.pvalue(s)
	}
	return p, nil
}

// Flags reports, for every score, whether it alarms (is above the
// threshold). A NaN score is an error that names its index: a NaN never
// silently passes as normal.
func (c *Calibration) Flags(scores []float64) ([]bool, error) {
	if err := c.check("alarm.Calibration.Flags"); err != nil {
		return nil, err
	}
	if err := checkScores("alarm.Calibration.Flags", scores); err != nil {
		return nil, err
	}
	out := make([]bool, len(scores))
	for i, s := range scores {
		out[i] = s > c.threshold
	}
	return out, nil
}

// check reports a nil or zero Calibration, which has no scores.
func (c *Calibration) check(where string) error {
	if c == nil || len(c.scores) == 0 {
		return fmt.Errorf("%s: the calibration holds no scores (build it with Calibrate): %w", where, ErrBadCalibration)
	}
	return nil
}

func checkScores(where string, scores []float64) error {
	for i, s := range scores {
		if math.IsNaN(s) {
			return errs.Arg(where, "scores", "score %d is NaN", i)
		}
	}
	return nil
}

// Summary describes the calibration scores for people reading a
// checkpoint's metadata. It is derived from the scores and is not needed
// to compute anything.
type Summary struct {
	Min    float64 `json:"min"`
	Median float64 `json:"median"`
	Q90    float64 `json:"q90"`
	Q99    float64 `json:"q99"`
	Max    float64 `json:"max"`
	Mean   float64 `json:"mean"`
	// SD is the sample standard deviation (n-1 in the denominator); 0 for
	// a single score.
	SD float64 `json:"sd"`
}

// Summary returns the summary of the calibration scores. Quantiles are
// empirical (gonum stat.Quantile with stat.Empirical). The zero
// Calibration gives the zero Summary.
func (c *Calibration) Summary() Summary {
	s := c.scores
	if len(s) == 0 {
		return Summary{}
	}
	q := func(p float64) float64 { return stat.Quantile(p, stat.Empirical, s, nil) }
	mean, sd := stat.MeanStdDev(s, nil)
	if len(s) < 2 {
		sd = 0
	}
	return Summary{Min: s[0], Median: q(0.5), Q90: q(0.9), Q99: q(0.99), Max: s[len(s)-1], Mean: mean, SD: sd}
}

// FormatVersion is the value of "format" in the JSON of a Calibration.
const FormatVersion = 1

// calibrationJSON is the wire form; see MarshalJSON.
type calibrationJSON struct {
	Format    int       `json:"format"`
	Rule      string    `json:"rule"`
	Alpha     float64   `json:"alpha"`
	N         int       `json:"n"`
	Rank      int       `json:"rank"`
	Threshold float64   `json:"threshold"`
	Summary   *Summary  `json:"summary,omitempty"`
	Scores    []float64 `json:"scores"`
}

// rule is stored with every calibration so that a reader in another
// language knows what the numbers mean.
const rule = "alarm when score > threshold; threshold = rank-th smallest of the n sorted calibration scores, rank = ceil((n+1)(1-alpha)); p-value(s) = (1 + #{scores >= s}) / (n+1)"

// MarshalJSON writes the calibration as a JSON object:
//
//	format     1
//	rule       a sentence stating the alarm rule and the p-value
//	alpha      the false-alarm rate
//	n          the number of calibration scores
//	rank       ceil((n+1)(1-alpha))
//	threshold  the rank-th smallest score; alarm when score > threshold
//	summary    min, median, q90, q99, max, mean, sd of the scores (for
//	           people; ignored when read back)
//	scores     the n calibration scores, sorted ascending
//
// Every score is kept (not a sketch), so p-values computed from the JSON
// are exactly those of the original calibration. Each score takes about 18
// bytes: 10 000 scores are about 180 kB.
func (c *Calibration) MarshalJSON() ([]byte, error) {
	if err := c.check("alarm.Calibration.MarshalJSON"); err != nil {
		return nil, err
	}
	s := c.Summary()
	return json.Marshal(calibrationJSON{Format: FormatVersion, Rule: rule, Alpha: c.alpha, N: len(c.scores), Rank: c.k,
		Threshold: c.threshold, Summary: &s, Scores: c.scores})
}

// UnmarshalJSON reads what MarshalJSON writes and checks it: the format,
// alpha, n equal to the number of scores, scores finite and sorted, and the
// rank and threshold that follow from them by the alarm rule. Errors wrap
// ErrBadCalibration. On error c is unchanged.
func (c *Calibration) UnmarshalJSON(b []byte) error {
	const where = "alarm.Calibration.UnmarshalJSON"
	var w calibrationJSON
	if err := json.Unmarshal(b, &w); err != nil {
		return fmt.Errorf("%s: %w: %w", where, ErrBadCalibration, err)
	}
	bad := func(format string, a ...any) error {
		return fmt.Errorf("%s: %s: %w", where, fmt.Sprintf(format, a...), ErrBadCalibration)
	}
	switch {
	case w.Format != FormatVersion:
		return bad("format %d, want %d", w.Format, FormatVersion)
	case !(w.Alpha > 0 && w.Alpha < 1):
		return bad("alpha %v, want 0 < alpha < 1", w.Alpha)
	case w.N != len(w.Scores):
		return bad("n is %d but there are %d scores", w.N, len(w.Scores))
	case w.N == 0:
		return bad("no scores")
	}
	for i, s := range w.Scores {
		if math.IsNaN(s) || math.IsInf(s, 0) {
			return bad("score %d is %v", i, s)
		}
		if i > 0 && s < w.Scores[i-1] {
			return bad("scores are not sorted: score %d (%v) is below score %d (%v)", i, s, i-1, w.Scores[i-1])
		}
	}
	k := rank(w.N, w.Alpha)
	switch {
	case k > w.N:
		return bad("%d scores are too few for alpha %v", w.N, w.Alpha)
	case w.Rank != k:
		return bad("rank %d, but the rule gives %d for n = %d, alpha = %v", w.Rank, k, w.N, w.Alpha)
	case w.Threshold != w.Scores[k-1]:
		return bad("threshold %v, but score %d is %v", w.Threshold, k, w.Scores[k-1])
	}
	*c = Calibration{alpha: w.Alpha, k: k, scores: w.Scores, threshold: w.Threshold}
	return nil
}
