package schedule

import (
	"encoding/json"
	"errors"
	"math"
	"strings"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/floats/scalar"
)

// All references below are written from the papers' statements, not from
// this package's code. Tolerance 1e-12 absolute/relative: the formulas are a
// handful of float64 operations on values of order 1, so rounding differs
// by a few ulps at most.
const tol = 1e-12

func near(a, b float64) bool { return scalar.EqualWithinAbsOrRel(a, b, tol, tol) }

// bowmanRamp is KL cost annealing, Bowman et al. 2016 section 3.1: the KL
// weight grows from its initial value to its final one during the first part
// of training and then stays. The paper does not fix the ramp's shape; a
// linear ramp is common practice, written here as an interpolation weight
// frac in [0, 1] of the way through warm-up.
func bowmanRamp(start, end float64, step, steps int) float64 {
	frac := 1.0
	if steps > 0 && step < steps {
		frac = float64(step) / float64(steps)
	}
	return (1-frac)*start + frac*end
}

func TestLinearWarmupMatchesRamp(t *testing.T) {
	cases := []LinearWarmup{
		{Start: 0, End: 1, Steps: 10},
		{Start: 0.1, End: 4, Steps: 7},
		{Start: 1, End: 0.25, Steps: 3}, // decreasing ramp
		{Start: 0, End: 1, Steps: 0},    // no warm-up
		{Start: 0, End: 1, Steps: 1},
	}
	for _, l := range cases {
		if err := l.Validate(); err != nil {
			t.Fatalf("%+v: %v", l, err)
		}
		for step := 0; step <= l.Steps+5; step++ {
			// reference: Bowman et al. 2016 sec. 3.1, linear ramp (common practice)
			want := bowmanRamp(l.Start, l.End, step, l.Steps)
			if got := l.At(step); !near(got, want) {
				t.Errorf("%+v At(%d) = %v, want %v", l, step, got, want)
			}
		}
	}
}

func TestLinearWarmupEdges(t *testing.T) {
	l := LinearWarmup{Start: 0, End: 1, Steps: 1000}
	// Step 0 is the first step: beta is exactly Start (the annealing starts
	// from the initial weight, Bowman et al. 2016 sec. 3.1).
	if got := l.At(0); got != 0 {
		t.Errorf("At(0) = %v, want 0", got)
	}
	if got := l.At(-5); got != 0 {
		t.Errorf("At(-5) = %v, want Start (negative step is step 0)", got)
	}
	// Half way through warm-up: 500/1000 of the way from 0 to 1.
	if got := l.At(500); got != 0.5 {
		t.Errorf("At(500) = %v, want 0.5", got)
	}
	// Last warm-up step is one step short of End; End is reached at Steps.
	if got, want := l.At(999), 0.999; !near(got, want) {
		t.Errorf("At(999) = %v, want %v", got, want)
	}
	for _, s := range []int{1000, 1001, 1 << 40} {
		if got := l.At(s); got != 1 {
			t.Errorf("At(%d) = %v, want End = 1", s, got)
		}
	}
	// Monotone non-decreasing for an increasing ramp.
	prev := l.At(0)
	for s := 1; s <= 1100; s++ {
		if v := l.At(s); v < prev {
			t.Fatalf("At(%d) = %v < At(%d) = %v", s, v, s-1, prev)
		}
		prev = l.At(s)
	}
}

// fuBeta is the cyclical schedule exactly as Fu et al. 2019 state it (from
// memory): iterations t = 1..T, M cycles,
//
//	tau    = mod(t-1, ceil(T/M)) / (T/M)
//	beta_t = f(tau) = tau/R  if tau <= R,   1  otherwise.
//
// The result is scaled by max (the paper's schedule ends at 1).
func fuBeta(t, bigT, m int, r, max float64) float64 {
	cycle := float64(bigT) / float64(m)
	tau := math.Mod(float64(t-1), math.Ceil(cycle)) / cycle
	if tau <= r {
		return max * tau / r
	}
	return max
}

func TestCyclicalMatchesFu2019(t *testing.T) {
	cases := []struct {
		bigT, m int
		r, max  float64
	}{
		{bigT: 400, m: 4, r: 0.5, max: 1}, // M = 4, R = 0.5 as in the paper's experiments (from memory)
		{bigT: 90, m: 3, r: 0.25, max: 2},
		{bigT: 70, m: 7, r: 1, max: 0.5}, // R = 1: the whole cycle increases
		{bigT: 12, m: 4, r: 0.3, max: 1}, // period 3: tau in {0, 1/3, 2/3}
	}
	for _, c := range cases {
		sched := Cyclical{Period: c.bigT / c.m, Ratio: c.r, Max: c.max}
		if err := sched.Validate(); err != nil {
			t.Fatal(err)
		}
		for tt := 1; tt <= c.bigT; tt++ {
			// reference: Fu et al. 2019, definition of beta_t (t counts from 1)
			want := fuBeta(tt, c.bigT, c.m, c.r, c.max)
			if got := sched.At(tt - 1); !near(got, want) {
				t.Errorf("%+v At(%d) = %v, want %v", sched, tt-1, got, want)
			}
		}
	}
}

func TestCyclicalBoundaries(t *testing.T) {
	// Period 100, R = 0.5: from the paper's formula, tau = (step mod 100)/100;
	// beta = tau/0.5 for tau <= 0.5, 1 after; every cycle restarts at 0.
	c := Cyclical{Period: 100, Ratio: 0.5, Max: 1}
	want := map[int]float64{
		-3:  0, // negative step is step 0
		0:   0, // start of the first cycle
		25:  0.5,
		49:  0.98,
		50:  1, // tau == R: f(R) = 1
		51:  1,
		99:  1, // last step of the cycle
		100: 0, // cycle boundary: restart
		125: 0.5,
		150: 1,
		200: 0,
	}
	for step, w := range want {
		if got := c.At(step); !near(got, w) {
			t.Errorf("At(%d) = %v, want %v", step, got, w)
		}
	}
}

func TestConstant(t *testing.T) {
	c := Constant{Value: 4}
	for _, s := range []int{-1, 0, 1, 1000, math.MaxInt} {
		if got := c.At(s); got != 4 {
			t.Errorf("At(%d) = %v, want 4", s, got)
		}
	}
}

// kingmaFreeBits is the free-bits objective term of Kingma et al. 2016 (the
// free-bits paragraph, from memory): sum over groups j of
// maximum(lambda, E_minibatch[KL_j]), one group per dimension here.
func kingmaFreeBits(lambda float64, kl []float64) float64 {
	terms := make([]float64, len(kl))
	for j, v := range kl {
		terms[j] = math.Max(lambda, v)
	}
	return floats.Sum(terms)
}

func TestFreeBitsObjective(t *testing.T) {
	f := FreeBits{Lambda: 0.5}
	kl := []float64{0.1, 0.5, 2.0, 0, -0.01, 0.49999, 3.25}
	total, clamped, err := f.Objective(kl)
	if err != nil {
		t.Fatal(err)
	}
	// reference: Kingma et al. 2016, free-bits objective
	if want := kingmaFreeBits(0.5, kl); !near(total, want) {
		t.Errorf("total = %v, want %v", total, want)
	}
	// By hand: 0.5+0.5+2+0.5+0.5+0.5+3.25 = 7.75.
	if !near(total, 7.75) {
		t.Errorf("total = %v, want 7.75", total)
	}
	wantClamped := []bool{true, false, false, true, true, true, false}
	for j := range kl {
		if clamped[j] != wantClamped[j] {
			t.Errorf("clamped[%d] = %v, want %v (kl %v, lambda 0.5)", j, clamped[j], wantClamped[j], kl[j])
		}
	}
	// Lambda 0 is the plain KL sum.
	total, clamped, err = FreeBits{}.Objective([]float64{0.25, 1, 2})
	if err != nil || total != 3.25 {
		t.Errorf("lambda 0: total %v err %v, want 3.25", total, err)
	}
	for j, c := range clamped {
		if c {
			t.Errorf("lambda 0: dimension %d clamped", j)
		}
	}
	// +Inf is allowed and passes through.
	if total, _, err := f.Objective([]float64{math.Inf(1), 0}); err != nil || !math.IsInf(total, 1) {
		t.Errorf("inf: total %v err %v", total, err)
	}
}

func TestFreeBitsErrors(t *testing.T) {
	cases := []struct {
		f    FreeBits
		kl   []float64
		want string
	}{
		{FreeBits{Lambda: 0.1}, nil, "kl"},
		{FreeBits{Lambda: 0.1}, []float64{1, math.NaN()}, "dimension 1"},
		{FreeBits{Lambda: -1}, []float64{1}, "Lambda"},
		{FreeBits{Lambda: math.NaN()}, []float64{1}, "Lambda"},
	}
	for _, c := range cases {
		_, _, err := c.f.Objective(c.kl)
		if !errors.Is(err, ErrInvalidArgument) || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%+v %v: err %v, want ErrInvalidArgument naming %q", c.f, c.kl, err, c.want)
		}
	}
}

// burgessPenalty is the capacity term of Burgess et al. 2018 (from memory,
// section 5): gamma * |KL - C|, with C increased linearly from zero to
// cMax during training (reached after `steps` steps and held).
func burgessPenalty(gamma, cMax float64, steps int, kl float64, step int) float64 {
	c := cMax
	if step < steps {
		c = cMax * float64(step) / float64(steps)
	}
	return gamma * math.Abs(kl-c)
}

func TestCapacity(t *testing.T) {
	c := Capacity{Gamma: 1000, Max: 25, Steps: 100000}
	if err := c.Validate(); err != nil {
		t.Fatal(err)
	}
	// Target edges: 0 at step 0, half way, Max at and after Steps.
	for step, want := range map[int]float64{-1: 0, 0: 0, 50000: 12.5, 99999: 24.99975, 100000: 25, 200000: 25} {
		if got := c.Target(step); !near(got, want) {
			t.Errorf("Target(%d) = %v, want %v", step, got, want)
		}
	}
	for _, step := range []int{0, 1, 400, 50000, 99999, 100000, 150000} {
		for _, kl := range []float64{0, 3.5, 12.5, 25, 40} {
			// reference: Burgess et al. 2018, gamma*|KL - C|
			want := burgessPenalty(1000, 25, 100000, kl, step)
			if got := c.Penalty(kl, step); !near(got, want) {
				t.Errorf("Penalty(%v, %d) = %v, want %v", kl, step, got, want)
			}
		}
	}
	// KL on target costs nothing.
	if got := c.Penalty(12.5, 50000); got != 0 {
		t.Errorf("Penalty on target = %v, want 0", got)
	}
	// Steps 0: target is Max from the start.
	if got := (Capacity{Gamma: 1, Max: 3}).Target(0); got != 3 {
		t.Errorf("Steps 0: Target(0) = %v, want 3", got)
	}
}

func TestValidate(t *testing.T) {
	nan, inf := math.NaN(), math.Inf(1)
	cases := []struct {
		v     interface{ Validate() error }
		field string
	}{
		{Constant{Value: -1}, "Value"},
		{Constant{Value: nan}, "Value"},
		{Constant{Value: inf}, "Value"},
		{LinearWarmup{Start: -0.1, End: 1, Steps: 10}, "Start"},
		{LinearWarmup{Start: 0, End: nan, Steps: 10}, "End"},
		{LinearWarmup{Start: 0, End: 1, Steps: -1}, "Steps"},
		{Cyclical{Period: 0, Ratio: 0.5, Max: 1}, "Period"},
		{Cyclical{Period: -4, Ratio: 0.5, Max: 1}, "Period"},
		{Cyclical{Period: 10, Ratio: 0, Max: 1}, "Ratio"},
		{Cyclical{Period: 10, Ratio: 1.5, Max: 1}, "Ratio"},
		{Cyclical{Period: 10, Ratio: nan, Max: 1}, "Ratio"},
		{Cyclical{Period: 10, Ratio: 0.5, Max: -2}, "Max"},
		{FreeBits{Lambda: inf}, "Lambda"},
		{Capacity{Gamma: -1, Max: 1, Steps: 1}, "Gamma"},
		{Capacity{Gamma: 1, Max: nan, Steps: 1}, "Max"},
		{Capacity{Gamma: 1, Max: 1, Steps: -3}, "Steps"},
	}
	for _, c := range cases {
		err := c.v.Validate()
		if !errors.Is(err, ErrInvalidArgument) {
			t.Errorf("%T%+v: err %v, want ErrInvalidArgument", c.v, c.v, err)
			continue
		}
		if !strings.Contains(err.Error(), ": "+c.field+":") {
			t.Errorf("%T%+v: error %q does not name field %s", c.v, c.v, err, c.field)
		}
	}
	valid := []interface{ Validate() error }{
		Constant{}, Constant{Value: 1},
		LinearWarmup{}, LinearWarmup{Start: 0, End: 1, Steps: 10},
		Cyclical{Period: 1, Ratio: 1, Max: 0}, Cyclical{Period: 10, Ratio: 0.5, Max: 1},
		FreeBits{}, Capacity{},
	}
	for _, v := range valid {
		if err := v.Validate(); err != nil {
			t.Errorf("%T%+v: unexpected %v", v, v, err)
		}
	}
}

// Invalid fields must not make At panic (integer division by zero).
func TestAtNeverPanicsOnInvalidFields(t *testing.T) {
	if got := (Cyclical{Period: 0, Ratio: 0.5, Max: 2}).At(7); got != 2 {
		t.Errorf("Period 0: At = %v, want Max", got)
	}
	if got := (Cyclical{Period: 5, Ratio: 0, Max: 2}).At(7); got != 2 {
		t.Errorf("Ratio 0: At = %v, want Max", got)
	}
	if got := (LinearWarmup{Start: 0, End: 3, Steps: -2}).At(0); got != 3 {
		t.Errorf("Steps -2: At = %v, want End", got)
	}
}

func TestSpecRoundTrip(t *testing.T) {
	scheds := []Beta{
		Constant{Value: 0.75},
		&Constant{Value: 2},
		LinearWarmup{Start: 0.01, End: 1, Steps: 5000},
		&LinearWarmup{Start: 0, End: 1, Steps: 1},
		Cyclical{Period: 250, Ratio: 0.5, Max: 1},
		&Cyclical{Period: 3, Ratio: 1, Max: 4},
	}
	for _, b := range scheds {
		spec, err := Describe(b)
		if err != nil {
			t.Fatalf("%T: %v", b, err)
		}
		raw, err := json.Marshal(spec)
		if err != nil {
			t.Fatal(err)
		}
		var back Spec
		if err := json.Unmarshal(raw, &back); err != nil {
			t.Fatal(err)
		}
		b2, err := FromSpec(back)
		if err != nil {
			t.Fatalf("%s: %v", raw, err)
		}
		for _, step := range []int{0, 1, 2, 3, 100, 124, 125, 249, 250, 4999, 5000, 10000} {
			if b.At(step) != b2.At(step) {
				t.Errorf("%s: At(%d) %v != %v", raw, step, b2.At(step), b.At(step))
			}
		}
	}
}

func TestSpecJSONForm(t *testing.T) {
	// The stored form is part of the checkpoint format; it is written out
	// here by hand so a change to it fails this test.
	spec, err := Describe(LinearWarmup{Start: 0, End: 1, Steps: 10000})
	if err != nil {
		t.Fatal(err)
	}
	raw, _ := json.Marshal(spec)
	if want := `{"kind":"linear-warmup","config":{"start":0,"end":1,"steps":10000}}`; string(raw) != want {
		t.Errorf("got %s, want %s", raw, want)
	}
	b, err := FromSpec(Spec{Kind: "cyclical", Config: json.RawMessage(`{"period":40,"ratio":0.5,"max":1}`)})
	if err != nil {
		t.Fatal(err)
	}
	if c, ok := b.(Cyclical); !ok || c != (Cyclical{Period: 40, Ratio: 0.5, Max: 1}) {
		t.Errorf("FromSpec = %#v", b)
	}
}

type userBeta struct{}

func (userBeta) At(int) float64 { return 1 }

func TestSpecErrors(t *testing.T) {
	if _, err := Describe(userBeta{}); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("Describe(user): %v", err)
	}
	if _, err := Describe(nil); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("Describe(nil): %v", err)
	}
	if _, err := Describe((*Cyclical)(nil)); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("Describe(nil *Cyclical): %v", err)
	}
	if _, err := Describe(Cyclical{Period: 0, Ratio: 0.5}); !errors.Is(err, ErrInvalidArgument) || !strings.Contains(err.Error(), "Period") {
		t.Errorf("Describe(invalid): %v", err)
	}
	cases := []struct {
		spec Spec
		want string
	}{
		{Spec{Kind: "sigmoid", Config: json.RawMessage(`{}`)}, "Kind"},
		{Spec{Kind: KindConstant}, "Config"},
		{Spec{Kind: KindConstant, Config: json.RawMessage(`{"value":1,"extra":2}`)}, "extra"},
		{Spec{Kind: KindConstant, Config: json.RawMessage(`{"value":"x"}`)}, "Config"},
		{Spec{Kind: KindConstant, Config: json.RawMessage(`{"value":1} {}`)}, "Config"},
		{Spec{Kind: KindCyclical, Config: json.RawMessage(`{"period":10,"ratio":2,"max":1}`)}, "Ratio"},
		{Spec{Kind: KindLinearWarmup, Config: json.RawMessage(`{"start":0,"end":1,"steps":-1}`)}, "Steps"},
	}
	for _, c := range cases {
		_, err := FromSpec(c.spec)
		if !errors.Is(err, ErrInvalidArgument) || !strings.Contains(err.Error(), c.want) {
			t.Errorf("FromSpec(%s %s): err %v, want ErrInvalidArgument naming %q", c.spec.Kind, c.spec.Config, err, c.want)
		}
	}
}
