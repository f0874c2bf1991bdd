package vae

import (
	"errors"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// Shared fixtures of the vae tests. Sizes are small so the whole package
// runs in seconds; float64 is used wherever a check needs exactness.

// smallMLP returns the float64 NewMLP model the composition tests use:
// 12 inputs, one hidden layer of 8, 3 latent dimensions.
func smallMLP(t testing.TB, seed uint64) *Model {
	t.Helper()
	m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Dtype: tensor.Float64, Seed: seed})
	if err != nil {
		t.Fatalf("NewMLP: %v", err)
	}
	return m
}

// binaryRows returns n records of f values, each 0 or 1 with probability
// one half, drawn from a PCG generator seeded with seed. They exercise the
// mechanics only; they are not evidence of anything statistical.
func binaryRows(n, f int, seed uint64) [][]float64 {
	rng := rand.New(rand.NewPCG(seed, 17))
	rows := make([][]float64, n)
	for i := range rows {
		rows[i] = make([]float64, f)
		for j := range rows[i] {
			if rng.IntN(2) == 1 {
				rows[i][j] = 1
			}
		}
	}
	return rows
}

func binarySet(t testing.TB, n, f int, seed uint64) *dataset.Set {
	t.Helper()
	s, err := dataset.FromRows(binaryRows(n, f, seed))
	if err != nil {
		t.Fatalf("dataset.FromRows: %v", err)
	}
	return s
}

// realSet returns n records of f standard normal values.
func realSet(t testing.TB, n, f int, seed uint64) *dataset.Set {
	t.Helper()
	rng := rand.New(rand.NewPCG(seed, 23))
	x := make([]float64, n*f)
	for i := range x {
		x[i] = rng.NormFloat64()
	}
	s, err := dataset.New(x, n, f)
	if err != nil {
		t.Fatalf("dataset.New: %v", err)
	}
	return s
}

func withLabels(t testing.TB, s *dataset.Set, labels []int, classes int) *dataset.Set {
	t.Helper()
	out, err := s.WithLabels(labels, classes)
	if err != nil {
		t.Fatalf("WithLabels: %v", err)
	}
	return out
}

// paramBits returns every parameter value of m as raw bits (float64 bits,
// or float32 bits widened), in parameter order.
func paramBits(m *Model) [][]uint64 {
	out := make([][]uint64, 0, len(m.params))
	for _, p := range m.params {
		switch d := p.Value.Data().(type) {
		case []float64:
			b := make([]uint64, len(d))
			for i, v := range d {
				b[i] = math.Float64bits(v)
			}
			out = append(out, b)
		case []float32:
			b := make([]uint64, len(d))
			for i, v := range d {
				b[i] = uint64(math.Float32bits(v))
			}
			out = append(out, b)
		}
	}
	return out
}

// sameBits reports whether two paramBits results are identical and, if
// not, the first parameter that differs.
func sameBits(m *Model, a, b [][]uint64) (bool, string) {
	if len(a) != len(b) {
		return false, "parameter count"
	}
	for i := range a {
		if len(a[i]) != len(b[i]) {
			return false, m.params[i].Name
		}
		for j := range a[i] {
			if a[i][j] != b[i][j] {
				return false, m.params[i].Name
			}
		}
	}
	return true, ""
}

// flatParams returns every parameter value of m as float64s, concatenated
// in parameter order.
func flatParams(m *Model) []float64 {
	var out []float64
	for _, p := range m.params {
		out = append(out, denseFloats(p.Value)...)
	}
	return out
}

// denseFloats returns a tensor's values as float64s.
func denseFloats(d *tensor.Dense) []float64 {
	switch x := d.Data().(type) {
	case []float64:
		return x
	case []float32:
		out := make([]float64, len(x))
		for i, v := range x {
			out[i] = float64(v)
		}
		return out
	}
	return nil
}

// relClose reports |a-b| <= tol*max(1, |a|, |b|).
func relClose(a, b, tol float64) bool {
	scale := math.Max(1, math.Max(math.Abs(a), math.Abs(b)))
	return math.Abs(a-b) <= tol*scale
}

// wantErr fails unless err wraps target and its message contains every
// one of words.
func wantErr(t *testing.T, what string, err, target error, words ...string) {
	t.Helper()
	if err == nil {
		t.Errorf("%s: no error, want one wrapping %v", what, target)
		return
	}
	if !errors.Is(err, target) {
		t.Errorf("%s: error %q does not wrap %v", what, err, target)
	}
	for _, w := range words {
		if !strings.Contains(err.Error(), w) {
			t.Errorf("%s: error %q does not name %q", what, err, w)
		}
	}
}

// must returns l, and panics (failing the test) on a constructor error in
// a fixture that is valid by construction.
func must[L any](l L, err error) L {
	if err != nil {
		panic("test fixture: " + err.Error())
	}
	return l
}

func f64Opt(seed uint64) layers.Options {
	return layers.Options{Dtype: tensor.Float64, Seed: seed}
}

// mixtureMLP is smallMLP with a learnable mixture prior, which has no
// closed-form KL, so the model takes the Monte Carlo KL path.
func mixtureMLP(t testing.TB, seed uint64) *Model {
	t.Helper()
	prior, err := priors.NewMixture("prior", 3, 3, priors.MixtureOptions{Dtype: tensor.Float64, Seed: seed})
	if err != nil {
		t.Fatal(err)
	}
	m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Dtype: tensor.Float64, Seed: seed, Prior: prior})
	if err != nil {
		t.Fatalf("NewMLP: %v", err)
	}
	return m
}
