package alarm

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

// TestKolmogorovQ checks the tail of the Kolmogorov distribution against
//   - the published critical values of the limit distribution (tables of
//     the Kolmogorov-Smirnov test, from memory): P(K > 1.2238) = 0.10,
//     P(K > 1.3581) = 0.05, P(K > 1.6276) = 0.01, P(K > 1.9495) = 0.001,
//     to the 4 digits the tables give;
//   - both of its closed forms summed in the test with 200 terms,
//     Kolmogorov's alternating series and its theta-function dual (the
//     identity of Jacobi; e.g. Marsaglia, Tsang and Wang 2003), which agree
//     to rounding over 0.3 <= lambda <= 3.
func TestKolmogorovQ(t *testing.T) {
	for lambda, want := range map[float64]float64{1.2238: 0.10, 1.3581: 0.05, 1.6276: 0.01, 1.9495: 0.001} {
		if got := KolmogorovQ(lambda); math.Abs(got-want) > 5e-5 {
			t.Errorf("KolmogorovQ(%v) = %.6f, want %v", lambda, got, want)
		}
	}
	alternating := func(l float64) float64 {
		var s float64
		for j := 200; j >= 1; j-- { // smallest terms first
			s += math.Pow(-1, float64(j-1)) * math.Exp(-2*float64(j*j)*l*l)
		}
		return 2 * s
	}
	theta := func(l float64) float64 {
		var s float64
		for j := 200; j >= 1; j-- {
			s += math.Exp(-float64((2*j-1)*(2*j-1)) * math.Pi * math.Pi / (8 * l * l))
		}
		return 1 - math.Sqrt(2*math.Pi)/l*s
	}
	for l := 0.3; l <= 3; l += 0.05 {
		a, b, got := alternating(l), theta(l), KolmogorovQ(l)
		if math.Abs(a-b) > 1e-13 {
			t.Fatalf("lambda %v: the two series disagree, %v and %v", l, a, b)
		}
		if math.Abs(got-a) > 1e-13 {
			t.Errorf("KolmogorovQ(%v) = %v, series give %v", l, got, a)
		}
	}
	if KolmogorovQ(0) != 1 || KolmogorovQ(-1) != 1 || KolmogorovQ(0.05) != 1 || !math.IsNaN(KolmogorovQ(math.NaN())) {
		t.Errorf("KolmogorovQ at 0, -1, 0.05, NaN: %v %v %v %v", KolmogorovQ(0), KolmogorovQ(-1), KolmogorovQ(0.05), KolmogorovQ(math.NaN()))
	}
	if q := KolmogorovQ(10); q != 0 && q > 1e-80 {
		t.Errorf("KolmogorovQ(10) = %v, want about 2 exp(-200)", q)
	}
}

// TestKolmogorovSmirnovStatistic checks D on samples counted by hand: the
// distribution functions of {1, 3} and {2, 4} differ by 1/2 at most (at 1
// and at 3), and {3, 1, 2} against {5, 4} do not overlap, D = 1. Inputs in
// any order; they are not modified.
func TestKolmogorovSmirnovStatistic(t *testing.T) {
	a, b := []float64{3, 1}, []float64{4, 2}
	d, _, err := KolmogorovSmirnov(a, b)
	if err != nil || d != 0.5 {
		t.Errorf("D({1,3}, {2,4}) = %v, %v; want 0.5", d, err)
	}
	if a[0] != 3 || b[0] != 4 {
		t.Errorf("inputs modified: %v %v", a, b)
	}
	d, p, err := KolmogorovSmirnov([]float64{3, 1, 2}, []float64{5, 4})
	if err != nil || d != 1 {
		t.Errorf("D of disjoint samples = %v, %v; want 1", d, err)
	}
	// ne = 6/5; lambda = (sqrt(1.2) + 0.12 + 0.11/sqrt(1.2)) * 1 (Stephens
	// 1970 as in Numerical Recipes), computed here from that formula.
	rt := math.Sqrt(1.2)
	if want := KolmogorovQ(rt + 0.12 + 0.11/rt); p != want {
		t.Errorf("p = %v, want Q(%v) = %v", p, rt+0.12+0.11/rt, want)
	}
	for name, c := range map[string][2][]float64{
		"a empty": {nil, {1}},
		"b empty": {{1}, nil},
		"a NaN":   {{1, math.NaN()}, {1}},
		"b NaN":   {{1}, {math.NaN()}},
	} {
		if _, _, err := KolmogorovSmirnov(c[0], c[1]); !errors.Is(err, ErrInvalidArgument) {
			t.Errorf("%s: err = %v", name, err)
		}
	}
}

// TestKolmogorovSmirnovPValueBySimulation checks the asymptotic p-value's
// level on samples of 150 and 200 from one gonum distuv.Normal: the
// fraction of p <= 0.05 over 2000 repetitions is at most 0.05 + 3.5
// binomial standard errors, and (the test is not uselessly conservative)
// at least 0.02. Under a shift of half a standard deviation it must reject
// in 90% or more (the power of the two-sample KS test at these sizes is
// about 0.97, from the normal approximation; a loose bound on purpose).
func TestKolmogorovSmirnovPValueBySimulation(t *testing.T) {
	const reps = 2000
	src := distuv.Normal{Mu: 0, Sigma: 1, Src: rand.NewPCG(9, 1)}
	a, b := make([]float64, 150), make([]float64, 200)
	level := func(shift float64) float64 {
		k := 0
		for range reps {
			for i := range a {
				a[i] = src.Rand()
			}
			for i := range b {
				b[i] = src.Rand() + shift
			}
			_, p, err := KolmogorovSmirnov(a, b)
			if err != nil {
				t.Fatal(err)
			}
			if p <= 0.05 {
				k++
			}
		}
		return float64(k) / reps
	}
	null := level(0)
	tol := 3.5 * math.Sqrt(0.05*0.95/reps)
	t.Logf("P(p <= 0.05): %.4f under the null (tolerance %.4f)", null, tol)
	if null > 0.05+tol || null < 0.02 {
		t.Errorf("P(p <= 0.05) under the null = %.4f, want between 0.02 and %.4f", null, 0.05+tol)
	}
	if pow := level(0.5); pow < 0.9 {
		t.Errorf("rejections under a shift of 0.5 sd: %.4f, want >= 0.9", pow)
	}
}

// TestClopperPearson checks the interval against
//   - its closed forms at the ends (Clopper and Pearson 1934; the binomial
//     tail has one term there): x = 0 gives hi = 1 - (a/2)^(1/n), x = n
//     gives lo = (a/2)^(1/n), and x = 1 gives lo = 1 - (1 - a/2)^(1/n);
//   - its definition for every x = 0..n, n = 1..40, through gonum's
//     distuv.Binomial: P(X >= x | lo) = a/2 and P(X <= x | hi) = a/2;
//   - table values from memory: 5 of 10 at 95% gives [0.1871, 0.8129] and
//     1 of 10 gives [0.0025, 0.4450], to 4 decimals.
func TestClopperPearson(t *testing.T) {
	const conf = 0.95
	a := 1 - conf
	for n := 1; n <= 40; n++ {
		for x := 0; x <= n; x++ {
			lo, hi, err := ClopperPearson(x, n, conf)
			if err != nil {
				t.Fatal(err)
			}
			if !(lo >= 0 && lo < hi && hi <= 1) || lo > float64(x)/float64(n) || hi < float64(x)/float64(n) {
				t.Fatalf("x %d n %d: [%v, %v] does not hold x/n", x, n, lo, hi)
			}
			nn := float64(n)
			switch x {
			case 0:
				if lo != 0 || math.Abs(hi-(1-math.Pow(a/2, 1/nn))) > 1e-12 {
					t.Errorf("x 0 n %d: [%v, %v], hi want %v", n, lo, hi, 1-math.Pow(a/2, 1/nn))
				}
			case n:
				if hi != 1 || math.Abs(lo-math.Pow(a/2, 1/nn)) > 1e-12 {
					t.Errorf("x n = %d: [%v, %v], lo want %v", n, lo, hi, math.Pow(a/2, 1/nn))
				}
			}
			if x == 1 {
				if want := 1 - math.Pow(1-a/2, 1/nn); math.Abs(lo-want) > 1e-12 {
					t.Errorf("x 1 n %d: lo %v, want %v", n, lo, want)
				}
			}
			if x > 0 {
				if tail := 1 - (distuv.Binomial{N: nn, P: lo}).CDF(float64(x-1)); math.Abs(tail-a/2) > 1e-9 {
					t.Errorf("x %d n %d: P(X >= x | lo = %v) = %v, want %v", x, n, lo, tail, a/2)
				}
			}
			if x < n {
				if tail := (distuv.Binomial{N: nn, P: hi}).CDF(float64(x)); math.Abs(tail-a/2) > 1e-9 {
					t.Errorf("x %d n %d: P(X <= x | hi = %v) = %v, want %v", x, n, hi, tail, a/2)
				}
			}
		}
	}
	for _, c := range []struct {
		x, n   int
		lo, hi float64
	}{{5, 10, 0.1871, 0.8129}, {1, 10, 0.0025, 0.4450}} {
		lo, hi, _ := ClopperPearson(c.x, c.n, conf)
		if math.Abs(lo-c.lo) > 5e-5 || math.Abs(hi-c.hi) > 5e-5 {
			t.Errorf("%d of %d: [%.4f, %.4f], table [%v, %v]", c.x, c.n, lo, hi, c.lo, c.hi)
		}
	}
	for _, c := range [][2]int{{-1, 5}, {6, 5}, {0, 0}} {
		if _, _, err := ClopperPearson(c[0], c[1], conf); !errors.Is(err, ErrInvalidArgument) {
			t.Errorf("x %d n %d: err = %v", c[0], c[1], err)
		}
	}
	if _, _, err := ClopperPearson(1, 5, 1); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("confidence 1: err = %v", err)
	}
}

// TestDrift checks Drift on windows drawn from gonum distributions: a
// window from the calibration distribution keeps the rate interval around
// alpha with a KS p-value above 0.001; a window whose scores grew by 30%
// (a drifted plant) has its whole interval above alpha and a KS p-value
// below 1e-6. The rate and interval are the count above the threshold and
// ClopperPearson of it, checked above.
func TestDrift(t *testing.T) {
	d := distuv.Gamma{Alpha: 3, Beta: 1, Src: rand.NewPCG(10, 1)}
	draw := func(n int, scale float64) []float64 {
		x := make([]float64, n)
		for i := range x {
			x[i] = d.Rand() * scale
		}
		return x
	}
	cal, err := Calibrate(draw(5000, 1), 0.01)
	if err != nil {
		t.Fatal(err)
	}
	same, err := cal.Drift(draw(3000, 1), 0)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("same: %+v", same)
	if same.Confidence != 0.95 || same.Window != 3000 || same.Alpha != 0.01 {
		t.Errorf("same: %+v", same)
	}
	if same.RateAboveAlpha() || same.RateLow > 0.01 || same.RateHigh < 0.01-1.0/5001 || same.KSPValue < 0.001 {
		t.Errorf("a window like the calibration reads as drift: %+v", same)
	}
	if lo, hi, _ := ClopperPearson(same.Alarms, same.Window, 0.95); lo != same.RateLow || hi != same.RateHigh {
		t.Errorf("interval [%v, %v], ClopperPearson gives [%v, %v]", same.RateLow, same.RateHigh, lo, hi)
	}
	grown, err := cal.Drift(draw(3000, 1.3), 0.99)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("grown: %+v", grown)
	if !grown.RateAboveAlpha() || grown.KSPValue > 1e-6 || grown.KS < 0.1 {
		t.Errorf("a window 30%% above the calibration does not read as drift: %+v", grown)
	}
	if _, err := cal.Drift(nil, 0); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("empty window: %v", err)
	}
	if _, err := cal.Drift([]float64{1, math.NaN()}, 0); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("NaN in the window: %v", err)
	}
	if _, err := cal.Drift([]float64{1}, 1.5); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("confidence 1.5: %v", err)
	}
}
