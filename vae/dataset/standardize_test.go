package dataset

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/floats/scalar"
	"gonum.org/v1/gonum/stat"
)

func column(s *Set, j int) []float64 {
	c := make([]float64, s.Len())
	for i := range c {
		c[i] = s.Row(i)[j]
	}
	return c
}

func randomSet(t *testing.T, n int) *Set {
	t.Helper()
	rng := rand.New(rand.NewPCG(3, 5))
	x := make([]float64, n*4)
	for i := range n {
		x[i*4+0] = rng.NormFloat64()*3 + 10 // spread 3 around 10
		x[i*4+1] = rng.Float64() * 1e-3     // small scale
		x[i*4+2] = 1e6 + rng.NormFloat64()  // large offset, unit spread
		x[i*4+3] = 0.1                      // constant: zero variance
	}
	s, err := New(x, n, 4)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func TestFitStandardizerMatchesGonum(t *testing.T) {
	s := randomSet(t, 500)
	z, err := FitStandardizer(s)
	if err != nil {
		t.Fatal(err)
	}
	for j := range 3 {
		// reference: gonum stat.PopMeanStdDev, the population (divide by N)
		// standard deviation. stat.MeanStdDev would give the sample (N-1)
		// version, larger by sqrt(N/(N-1)); FitStandardizer documents N.
		m, sd := stat.PopMeanStdDev(column(s, j), nil)
		// 1e-9 relative: both are two-pass sums over 500 values; their
		// rounding differs by far less, while a wrong divisor (N-1) would
		// be off by 1e-3 relative.
		if !scalar.EqualWithinRel(z.Mean[j], m, 1e-12) || !scalar.EqualWithinRel(z.Std[j], sd, 1e-9) {
			t.Fatalf("feature %d: mean %v std %v, gonum PopMeanStdDev %v %v", j, z.Mean[j], z.Std[j], m, sd)
		}
		_, sample := stat.MeanStdDev(column(s, j), nil)
		if scalar.EqualWithinRel(z.Std[j], sample, 1e-6) {
			t.Fatalf("feature %d: std equals the sample (N-1) std %v", j, sample)
		}
	}
	// Constant feature 3: documented to get Std 1 (its mean is 0.1).
	if z.Std[3] != 1 || !scalar.EqualWithinRel(z.Mean[3], 0.1, 1e-14) {
		t.Fatalf("constant feature: mean %v std %v, want 0.1 and 1", z.Mean[3], z.Std[3])
	}

	y, err := z.Apply(s)
	if err != nil {
		t.Fatal(err)
	}
	for j := range 3 {
		// reference: gonum stat.PopMeanStdDev of the standardised column.
		m, sd := stat.PopMeanStdDev(column(y, j), nil)
		if math.Abs(m) > 1e-9 || math.Abs(sd-1) > 1e-9 {
			t.Fatalf("standardised feature %d: mean %v std %v, want 0 and 1", j, m, sd)
		}
	}
	back, err := z.Invert(y)
	if err != nil {
		t.Fatal(err)
	}
	// reference: gonum floats.EqualApprox; the round trip loses only a few
	// ulps of the largest value (1e6), hence 1e-8 absolute.
	if !floats.EqualApprox(back.Values(), s.Values(), 1e-8) {
		t.Fatal("Invert(Apply(s)) differs from s")
	}
}

func TestStandardizerSlicesAndJSON(t *testing.T) {
	z := Standardizer{Mean: []float64{1, -2}, Std: []float64{2, 0.5}}
	x64 := []float64{3, -1, 1, -2}
	if err := z.ApplySlice(x64); err != nil {
		t.Fatal(err)
	}
	// (3-1)/2 = 1, (-1+2)/0.5 = 2, (1-1)/2 = 0, (-2+2)/0.5 = 0
	if !floats.Equal(x64, []float64{1, 2, 0, 0}) {
		t.Fatalf("ApplySlice %v", x64)
	}
	x32 := []float32{1, 2}
	if err := z.InvertSlice(x32); err != nil {
		t.Fatal(err)
	}
	if x32[0] != 3 || x32[1] != -1 {
		t.Fatalf("InvertSlice %v, want [3 -1]", x32)
	}
	mustErr(t, z.ApplySlice(make([]float64, 3)), ErrInvalidArgument, "multiple of 2")
	mustErr(t, z.ApplySlice([]int{1, 2}), ErrInvalidArgument, "[]int")

	b, err := json.Marshal(z)
	if err != nil {
		t.Fatal(err)
	}
	var back Standardizer
	if err := json.Unmarshal(b, &back); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(back, z) {
		t.Fatalf("JSON round trip %s gave %+v", b, back)
	}

	bad := Standardizer{Mean: []float64{0}, Std: []float64{0}}
	mustErr(t, bad.Validate(), ErrInvalidArgument, "Std", "feature 0")
	s, _ := New([]float64{1, 2, 3}, 1, 3)
	_, err = z.Apply(s)
	mustErr(t, err, ErrInvalidArgument, "3 features", "has 2")
	_, err = FitStandardizer(nil)
	mustErr(t, err, ErrInvalidArgument, "s")
	empty, _ := New(nil, 0, 2)
	_, err = FitStandardizer(empty)
	mustErr(t, err, ErrInvalidArgument, "no records")
}
