package alarm

import (
	"encoding/json"
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"strconv"
	"strings"
	"testing"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
)

// sampler is a distribution that gonum distuv can draw from and give the
// survival function of.
type sampler interface {
	Rand() float64
	Survival(float64) float64
}

// TestRankAndRecordsNeeded checks the rank k = ceil((n+1)(1-alpha)) and the
// smallest n it allows against values worked out by hand from that
// definition (Angelopoulos and Bates 2021; Vovk et al. 2005).
func TestRankAndRecordsNeeded(t *testing.T) {
	for _, c := range []struct {
		n     int
		alpha float64
		k     int // by hand
	}{
		{99, 0.01, 99},     // 100 * 0.99 = 99 exactly: the decimal alpha must not round up to 100
		{15, 0.2, 13},      // 16 * 0.8 = 12.8
		{199, 0.05, 190},   // 200 * 0.95 = 190 exactly
		{8640, 0.01, 8555}, // 8641 * 0.99 = 8554.59
		{57, 0.1, 53},      // 58 * 0.9 = 52.2
		{3, 0.3, 3},        // 4 * 0.7 = 2.8
		{1, 0.5, 1},        // 2 * 0.5 = 1
	} {
		if got := rank(c.n, c.alpha); got != c.k {
			t.Errorf("rank(n=%d, alpha=%v) = %d, want %d", c.n, c.alpha, got, c.k)
		}
	}
	// Smallest n with ceil((n+1)(1-alpha)) <= n, i.e. n >= 1/alpha - 1,
	// by hand: 1/0.01 - 1 = 99; 1/0.05 - 1 = 19; 1/0.2 - 1 = 4;
	// 1/0.3 - 1 = 2.33 -> 3; 1/0.001 - 1 = 999; 1/0.5 - 1 = 1.
	for alpha, want := range map[float64]int{0.01: 99, 0.05: 19, 0.2: 4, 0.3: 3, 0.001: 999, 0.5: 1, 0.9: 1} {
		got, err := RecordsNeeded(alpha)
		if err != nil || got != want {
			t.Errorf("RecordsNeeded(%v) = %d, %v; want %d", alpha, got, err, want)
			continue
		}
		// Calibrate accepts exactly that many and refuses one fewer,
		// saying how many are needed.
		scores := make([]float64, want)
		for i := range scores {
			scores[i] = float64(i)
		}
		if _, err := Calibrate(scores, alpha); err != nil {
			t.Errorf("Calibrate(%d scores, %v): %v", want, alpha, err)
		}
		if want > 1 {
			_, err := Calibrate(scores[:want-1], alpha)
			if !errors.Is(err, ErrTooFew) || !errors.Is(err, ErrInvalidArgument) {
				t.Errorf("Calibrate(%d scores, %v): err = %v, want ErrTooFew and ErrInvalidArgument", want-1, alpha, err)
			} else if !strings.Contains(err.Error(), "at least "+strconv.Itoa(want)) {
				t.Errorf("Calibrate(%d scores, %v): %q does not say %d are needed", want-1, alpha, err, want)
			}
		}
	}
}

// TestHandExample checks the threshold and p-values on scores 1..20 against
// the definitions worked by hand: alpha = 0.1 gives k = ceil(21 * 0.9) =
// ceil(18.9) = 19, so the threshold is 19; p(s) = (1 + #{scores >= s})/21.
func TestHandExample(t *testing.T) {
	scores := make([]float64, 20)
	for i := range scores {
		scores[i] = float64((i*7)%20 + 1) // 1..20 in a scrambled order
	}
	c, err := Calibrate(scores, 0.1)
	if err != nil {
		t.Fatal(err)
	}
	if c.Threshold() != 19 || c.Rank() != 19 || c.N() != 20 || c.Alpha() != 0.1 {
		t.Errorf("threshold %v rank %d n %d alpha %v; want 19, 19, 20, 0.1", c.Threshold(), c.Rank(), c.N(), c.Alpha())
	}
	for s, want := range map[float64]float64{
		0:           21.0 / 21, // all 20 are >= 0
		19:          3.0 / 21,  // 19 and 20
		19.5:        2.0 / 21,  // 20
		20:          2.0 / 21,
		21:          1.0 / 21, // none: the smallest p-value there is
		math.Inf(1): 1.0 / 21,
	} {
		p, err := c.PValue(s)
		if err != nil || math.Abs(p-want) > 1e-15 {
			t.Errorf("PValue(%v) = %v, %v; want %v", s, p, err, want)
		}
	}
	flags, err := c.Flags([]float64{18, 19, 19.5, 25})
	if err != nil || !slices.Equal(flags, []bool{false, false, true, true}) {
		t.Errorf("Flags = %v, %v; want the scores above 19 only", flags, err)
	}
	if lo, hi := c.Guarantee(); math.Abs(lo-(0.1-1.0/21)) > 1e-15 || hi != 0.1 {
		t.Errorf("Guarantee = [%v, %v], want [0.1 - 1/21, 0.1]", lo, hi)
	}
	// The input is not sorted in place.
	if scores[0] != 1 || scores[1] != 8 {
		t.Errorf("Calibrate modified its input: %v", scores[:3])
	}
}

// TestGuaranteeBySimulation draws exchangeable normal scores from known
// distributions (gonum distuv) and checks the split-conformal guarantee
// (Vovk et al. 2005; Angelopoulos and Bates 2021, Theorem 1 with its upper
// bound): over the draw of the n calibration scores and one new score,
//
//	alpha - 1/(n+1) <= P(new score > threshold) <= alpha,
//
// and, for continuous scores, P = (n+1-k)/(n+1) exactly. Each repetition
// draws a fresh calibration set and one new score, so the number of alarms
// over R repetitions is Binomial(R, P): the tolerance is 3.5 binomial
// standard errors, sqrt(P(1-P)/R), which a correct rule exceeds with
// probability about 5e-4 (and the seeds are fixed). The case n = 15,
// alpha = 0.2 would fail with the plain empirical quantile
// ceil(n(1-alpha)) = 12, whose rate is 4/16 = 0.25.
func TestGuaranteeBySimulation(t *testing.T) {
	scale := 1
	if testing.Short() {
		scale = 4 // the tolerance follows; n = 15 still tells the rules apart (0.25 vs 0.2 + 0.019)
	}
	for i, c := range []struct {
		name  string
		dist  sampler
		n     int
		alpha float64
		reps  int
	}{
		{"normal", distuv.Normal{Mu: 3, Sigma: 2, Src: rand.NewPCG(1, 1)}, 15, 0.2, 20000},
		{"gamma", distuv.Gamma{Alpha: 2, Beta: 0.5, Src: rand.NewPCG(1, 2)}, 199, 0.05, 8000},
		{"lognormal", distuv.LogNormal{Mu: 0, Sigma: 1, Src: rand.NewPCG(1, 3)}, 99, 0.01, 10000},
		{"weibull", distuv.Weibull{K: 1.5, Lambda: 1, Src: rand.NewPCG(1, 4)}, 57, 0.1, 10000},
	} {
		reps := c.reps / scale
		alarms := 0
		cal := make([]float64, c.n)
		for range reps {
			for j := range cal {
				cal[j] = c.dist.Rand()
			}
			cb, err := Calibrate(cal, c.alpha)
			if err != nil {
				t.Fatal(err)
			}
			if c.dist.Rand() > cb.Threshold() {
				alarms++
			}
		}
		rate := float64(alarms) / float64(reps)
		k := rank(c.n, c.alpha)
		exact := float64(c.n+1-k) / float64(c.n+1)
		tol := 3.5 * math.Sqrt(exact*(1-exact)/float64(reps))
		t.Logf("case %d %s: n %d alpha %v: rate %.4f, exact %.4f, tolerance %.4f", i, c.name, c.n, c.alpha, rate, exact, tol)
		if rate > c.alpha+tol {
			t.Errorf("%s: false-alarm rate %.4f above alpha %v (+ %.4f)", c.name, rate, c.alpha, tol)
		}
		if low := c.alpha - 1/float64(c.n+1); rate < low-tol {
			t.Errorf("%s: false-alarm rate %.4f below alpha - 1/(n+1) = %.4f (- %.4f)", c.name, rate, low, tol)
		}
		if math.Abs(rate-exact) > tol {
			t.Errorf("%s: false-alarm rate %.4f, want (n+1-k)/(n+1) = %.4f within %.4f", c.name, rate, exact, tol)
		}
	}
}

// TestGuaranteeWithTies checks the upper bound with heavily tied scores
// (Poisson counts, gonum distuv): ties only lower the rate, so it must stay
// at most alpha (Angelopoulos and Bates 2021: the upper bound needs no
// continuity). Same binomial tolerance as above.
func TestGuaranteeWithTies(t *testing.T) {
	const reps, n, alpha = 20000, 49, 0.1
	d := distuv.Poisson{Lambda: 3, Src: rand.NewPCG(2, 1)}
	alarms := 0
	cal := make([]float64, n)
	for range reps {
		for j := range cal {
			cal[j] = d.Rand()
		}
		c, err := Calibrate(cal, alpha)
		if err != nil {
			t.Fatal(err)
		}
		if d.Rand() > c.Threshold() {
			alarms++
		}
	}
	rate := float64(alarms) / reps
	tol := 3.5 * math.Sqrt(alpha*(1-alpha)/reps)
	t.Logf("Poisson scores: rate %.4f (alpha %v, tolerance %.4f)", rate, alpha, tol)
	if rate > alpha+tol {
		t.Errorf("false-alarm rate %.4f above alpha %v + %.4f", rate, alpha, tol)
	}
}

// TestConditionalRateIsBeta checks the distribution of the false-alarm rate
// given one calibration set: for continuous scores it is Beta(l, n+1-l)
// with l = n+1-k (Vovk 2012; Angelopoulos and Bates 2021). The rate given
// the set is the survival function of the score distribution at the
// threshold (gonum distuv.Normal), and its empirical distribution over R
// sets is compared with gonum's distuv.Beta CDF by the one-sample
// Kolmogorov-Smirnov distance. The bound 1.95/sqrt(R) is the asymptotic
// 0.1% critical value, sqrt(-ln(0.0005)/2)/sqrt(R) (common practice; the
// leading term of Kolmogorov's series).
func TestConditionalRateIsBeta(t *testing.T) {
	const reps, n, alpha = 2000, 199, 0.05
	d := distuv.Normal{Mu: 0, Sigma: 1, Src: rand.NewPCG(3, 1)}
	rates := make([]float64, reps)
	cal := make([]float64, n)
	for r := range rates {
		for j := range cal {
			cal[j] = d.Rand()
		}
		c, err := Calibrate(cal, alpha)
		if err != nil {
			t.Fatal(err)
		}
		rates[r] = d.Survival(c.Threshold())
	}
	l := float64(n + 1 - rank(n, alpha))
	ref := distuv.Beta{Alpha: l, Beta: float64(n+1) - l}
	slices.Sort(rates)
	var dist float64
	for i, x := range rates {
		f := ref.CDF(x)
		dist = math.Max(dist, math.Max(float64(i+1)/reps-f, f-float64(i)/reps))
	}
	crit := math.Sqrt(-math.Log(0.0005)/2) / math.Sqrt(reps)
	t.Logf("KS distance to Beta(%v, %v): %.4f (critical %.4f)", l, float64(n+1)-l, dist, crit)
	if dist > crit {
		t.Errorf("conditional false-alarm rate: KS distance %.4f to Beta(%v, %v) above %.4f", dist, l, float64(n+1)-l, crit)
	}
}

// TestPValuesSuperUniform checks that conformal p-values of normal records
// are super-uniform, P(p <= t) <= t (Bates et al. 2023; for continuous
// scores they are uniform on {1, ..., n+1}/(n+1)).
// Each repetition draws a fresh calibration set and one new score from
// gonum distuv.Normal, so the R p-values are independent. Two checks:
//   - the two-sample Kolmogorov-Smirnov distance (gonum
//     stat.KolmogorovSmirnov) to 20000 draws of gonum distuv.Uniform stays
//     below the asymptotic 0.1% critical value
//     sqrt(-ln(0.0005)/2) sqrt((R+M)/(R M)) (common practice); the grid
//     of 1/(n+1) = 0.005 adds at most 0.005 to the distance;
//   - at t = 0.01, 0.05, 0.1, 0.5 the fraction with p <= t is at most
//     t + 3.5 binomial standard errors.
func TestPValuesSuperUniform(t *testing.T) {
	const reps, n, ref = 4000, 199, 20000
	d := distuv.Normal{Mu: 10, Sigma: 3, Src: rand.NewPCG(4, 1)}
	ps := make([]float64, reps)
	cal := make([]float64, n)
	for r := range ps {
		for j := range cal {
			cal[j] = d.Rand()
		}
		c, err := Calibrate(cal, 0.05)
		if err != nil {
			t.Fatal(err)
		}
		if ps[r], err = c.PValue(d.Rand()); err != nil {
			t.Fatal(err)
		}
	}
	u := distuv.Uniform{Min: 0, Max: 1, Src: rand.NewPCG(4, 2)}
	us := make([]float64, ref)
	for i := range us {
		us[i] = u.Rand()
	}
	slices.Sort(us)
	sorted := slices.Clone(ps)
	slices.Sort(sorted)
	dist := stat.KolmogorovSmirnov(sorted, nil, us, nil)
	crit := math.Sqrt(-math.Log(0.0005)/2)*math.Sqrt(float64(reps+ref)/float64(reps*ref)) + 1.0/(n+1)
	t.Logf("KS distance of the p-values to uniform: %.4f (critical %.4f)", dist, crit)
	if dist > crit {
		t.Errorf("conformal p-values: KS distance %.4f to the uniform above %.4f", dist, crit)
	}
	for _, tt := range []float64{0.01, 0.05, 0.1, 0.5} {
		k := 0
		for _, p := range ps {
			if p <= tt {
				k++
			}
		}
		frac := float64(k) / reps
		if tol := 3.5 * math.Sqrt(tt*(1-tt)/reps); frac > tt+tol {
			t.Errorf("P(p <= %v) = %.4f, above %v + %.4f", tt, frac, tt, tol)
		}
	}
}

// TestFlagIffPValueAtMostAlpha checks the identity stated by Bates et al.
// (2023) between the threshold rule and the p-value: s > threshold exactly
// when p(s) <= alpha. It follows from the definitions: s is above the k-th
// smallest score iff #{scores >= s} <= n-k = floor((n+1)alpha - 1).
// Scores include ties with calibration values.
func TestFlagIffPValueAtMostAlpha(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 1))
	for _, c := range []struct {
		n     int
		alpha float64
	}{{99, 0.01}, {250, 0.05}, {15, 0.2}, {1000, 0.003}} {
		cal := make([]float64, c.n)
		for i := range cal {
			cal[i] = math.Round(rng.NormFloat64() * 20) // ties on purpose
		}
		cb, err := Calibrate(cal, c.alpha)
		if err != nil {
			t.Fatal(err)
		}
		for s := -80.0; s <= 80; s += 0.5 {
			p, _ := cb.PValue(s)
			if (s > cb.Threshold()) != (p <= c.alpha) {
				t.Errorf("n %d alpha %v: score %v: above threshold %v is %v but p = %v", c.n, c.alpha, s, cb.Threshold(), s > cb.Threshold(), p)
			}
		}
	}
}

func TestCalibrateErrors(t *testing.T) {
	good := []float64{1, 2, 3, 4, 5}
	for _, c := range []struct {
		name   string
		scores []float64
		alpha  float64
		want   string
	}{
		{"alpha 0", good, 0, "alpha"},
		{"alpha 1", good, 1, "alpha"},
		{"alpha NaN", good, math.NaN(), "alpha"},
		{"empty", nil, 0.5, "no calibration scores"},
		{"NaN", []float64{1, 2, math.NaN(), 4}, 0.5, "score 2 is NaN"},
		{"Inf", []float64{1, math.Inf(1), 3}, 0.5, "score 1 is +Inf"},
	} {
		_, err := Calibrate(c.scores, c.alpha)
		if !errors.Is(err, ErrInvalidArgument) || !strings.Contains(err.Error(), c.want) || !strings.Contains(err.Error(), "alarm.Calibrate") {
			t.Errorf("%s: err = %v, want ErrInvalidArgument naming %q", c.name, err, c.want)
		}
	}
	c, err := Calibrate(good, 0.5)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := c.PValues([]float64{1, math.NaN()}); !errors.Is(err, ErrInvalidArgument) || !strings.Contains(err.Error(), "score 1 is NaN") {
		t.Errorf("PValues with NaN: %v", err)
	}
	if _, err := c.Flags([]float64{math.NaN()}); !errors.Is(err, ErrInvalidArgument) || !strings.Contains(err.Error(), "score 0 is NaN") {
		t.Errorf("Flags with NaN: %v", err)
	}
	if _, err := c.PValue(math.NaN()); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("PValue(NaN): %v", err)
	}
	if _, err := RecordsNeeded(1e-300); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("RecordsNeeded(1e-300): %v", err)
	}
}

// TestZeroCalibration checks that a Calibration not built by Calibrate
// reports an error instead of panicking or answering.
func TestZeroCalibration(t *testing.T) {
	for _, c := range []*Calibration{{}, nil} {
		errs := map[string]error{}
		_, errs["PValue"] = c.PValue(1)
		_, errs["PValues"] = c.PValues([]float64{1})
		_, errs["Flags"] = c.Flags([]float64{1})
		_, errs["Screen"] = c.Screen([]float64{1}, 0.1)
		_, errs["Drift"] = c.Drift([]float64{1}, 0)
		_, errs["MarshalJSON"] = json.Marshal(c)
		for name, err := range errs {
			if name == "MarshalJSON" && c == nil {
				continue // encoding/json writes null for a nil pointer
			}
			if !errors.Is(err, ErrBadCalibration) {
				t.Errorf("%v.%s: err = %v, want ErrBadCalibration", c, name, err)
			}
		}
	}
	if (&Calibration{}).Summary() != (Summary{}) {
		t.Error("Summary of the zero Calibration is not the zero Summary")
	}
}

// TestJSONRoundTrip checks that a calibration read back from its JSON gives
// the same threshold and p-values, and that the summary matches gonum's
// stat on the scores.
func TestJSONRoundTrip(t *testing.T) {
	rng := rand.New(rand.NewPCG(6, 1))
	scores := make([]float64, 500)
	for i := range scores {
		scores[i] = rng.ExpFloat64() * 3
	}
	c, err := Calibrate(scores, 0.02)
	if err != nil {
		t.Fatal(err)
	}
	b, err := json.Marshal(c)
	if err != nil {
		t.Fatal(err)
	}
	var back Calibration
	if err := json.Unmarshal(b, &back); err != nil {
		t.Fatal(err)
	}
	if back.Threshold() != c.Threshold() || back.Alpha() != c.Alpha() || back.N() != c.N() || back.Rank() != c.Rank() {
		t.Errorf("round trip: %v %v %v %v, want %v %v %v %v", back.Threshold(), back.Alpha(), back.N(), back.Rank(),
			c.Threshold(), c.Alpha(), c.N(), c.Rank())
	}
	probe := []float64{-1, 0, 0.5, 3, 10, c.Threshold(), 100}
	p1, _ := c.PValues(probe)
	p2, _ := back.PValues(probe)
	if !slices.Equal(p1, p2) {
		t.Errorf("p-values after the round trip %v, want %v", p2, p1)
	}
	var w map[string]any
	if err := json.Unmarshal(b, &w); err != nil {
		t.Fatal(err)
	}
	sum := w["summary"].(map[string]any)
	mean, sd := stat.MeanStdDev(scores, nil) // gonum on the unsorted input
	if math.Abs(sum["mean"].(float64)-mean) > 1e-12 || math.Abs(sum["sd"].(float64)-sd) > 1e-12 {
		t.Errorf("summary mean %v sd %v, gonum says %v %v", sum["mean"], sum["sd"], mean, sd)
	}
	if sum["max"].(float64) != slices.Max(scores) || sum["min"].(float64) != slices.Min(scores) {
		t.Errorf("summary min/max %v/%v", sum["min"], sum["max"])
	}
}

func TestUnmarshalRejects(t *testing.T) {
	c, err := Calibrate([]float64{5, 1, 4, 2, 3}, 0.2) // k = ceil(6*0.8) = 5, threshold 5
	if err != nil {
		t.Fatal(err)
	}
	b, _ := json.Marshal(c)
	good := string(b)
	for name, bad := range map[string]string{
		"not JSON":           "{",
		"format":             strings.Replace(good, `"format":1`, `"format":2`, 1),
		"alpha":              strings.Replace(good, `"alpha":0.2`, `"alpha":1.5`, 1),
		"n":                  strings.Replace(good, `"n":5`, `"n":6`, 1),
		"rank":               strings.Replace(good, `"rank":5`, `"rank":4`, 1),
		"threshold":          strings.Replace(good, `"threshold":5`, `"threshold":4`, 1),
		"unsorted":           strings.Replace(good, `"scores":[1,2,3,4,5]`, `"scores":[1,3,2,4,5]`, 1),
		"too few":            strings.Replace(strings.Replace(good, `"alpha":0.2`, `"alpha":0.1`, 1), `"rank":5`, `"rank":6`, 1),
		"no scores":          `{"format":1,"alpha":0.1,"n":0,"rank":1,"threshold":0,"scores":[]}`,
		"missing scores":     `{"format":1,"alpha":0.1,"n":3,"rank":1,"threshold":0}`,
		"string score":       strings.Replace(good, `"scores":[1,2,3,4,5]`, `"scores":[1,2,3,4,"5"]`, 1),
		"missing everything": `{}`,
	} {
		if bad == good {
			t.Fatalf("%s: the edit did not apply to %s", name, good)
		}
		back := *c
		if err := back.UnmarshalJSON([]byte(bad)); !errors.Is(err, ErrBadCalibration) {
			t.Errorf("%s: err = %v, want ErrBadCalibration", name, err)
		}
		if back.Threshold() != c.Threshold() || back.N() != c.N() {
			t.Errorf("%s: a failed UnmarshalJSON changed the calibration", name)
		}
	}
}
