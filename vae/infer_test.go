package vae

import (
	"context"
	"errors"
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae/dataset"
)

func TestInferenceArgumentErrors(t *testing.T) {
	ctx := context.Background()
	m := smallMLP(t, 1)
	empty, err := dataset.New(nil, 0, 12)
	if err != nil {
		t.Fatal(err)
	}
	narrow := binarySet(t, 3, 5, 1)
	data := binarySet(t, 3, 12, 1)
	calls := map[string]func(*dataset.Set) error{
		"Encode":      func(d *dataset.Set) error { _, _, err := m.Encode(ctx, d); return err },
		"Reconstruct": func(d *dataset.Set) error { _, err := m.Reconstruct(ctx, d); return err },
		"Score":       func(d *dataset.Set) error { _, err := m.Score(ctx, d, ScoreOptions{}); return err },
		"Evaluate":    func(d *dataset.Set) error { _, err := m.Evaluate(ctx, d, EvalOptions{}); return err },
		"Interpolate": func(d *dataset.Set) error { _, err := m.Interpolate(ctx, d, 0, 1, 3); return err },
	}
	for name, call := range calls {
		wantErr(t, name+" nil data", call(nil), layers.ErrInvalidArgument, "vae."+name, "data")
		wantErr(t, name+" 5 features", call(narrow), layers.ErrInvalidArgument, "vae."+name, "features")
		if name != "Interpolate" {
			wantErr(t, name+" no records", call(empty), layers.ErrInvalidArgument, "vae."+name, "no records")
		}
	}
	_, err = m.Evaluate(ctx, data, EvalOptions{K: -1})
	wantErr(t, "Evaluate K -1", err, layers.ErrInvalidArgument, "K")
	_, err = m.Decode(ctx, nil, nil)
	wantErr(t, "Decode nil z", err, layers.ErrInvalidArgument, "z")
	_, err = m.Decode(ctx, mat.NewDense(2, 4, nil), nil)
	wantErr(t, "Decode z of width 4", err, layers.ErrInvalidArgument, "z", "4")
	_, err = m.Decode(ctx, mat.NewDense(2, 3, []float64{0, 0, 0, 0, math.NaN(), 0}), nil)
	wantErr(t, "Decode NaN z", err, layers.ErrInvalidArgument, "row 1", "column 1", "NaN")
	_, err = m.SamplePrior(0, 1)
	wantErr(t, "SamplePrior 0", err, layers.ErrInvalidArgument, "n")
	_, err = m.Generate(ctx, 0, nil, 1)
	wantErr(t, "Generate 0", err, layers.ErrInvalidArgument, "n")
	_, err = m.Interpolate(ctx, data, 0, 3, 4)
	wantErr(t, "Interpolate record 3 of 3", err, layers.ErrInvalidArgument, "3")
	_, err = m.Interpolate(ctx, data, 0, 1, 1)
	wantErr(t, "Interpolate 1 step", err, layers.ErrInvalidArgument, "steps")

	done, cancel := context.WithCancel(ctx)
	cancel()
	if _, err := m.Score(done, data, ScoreOptions{}); !errors.Is(err, context.Canceled) {
		t.Errorf("Score with a cancelled context: %v", err)
	}
	if _, err := m.Evaluate(done, data, EvalOptions{}); !errors.Is(err, context.Canceled) {
		t.Errorf("Evaluate with a cancelled context: %v", err)
	}
}

// TestInterpolateAndReconstruct checks the deterministic inference paths
// against each other: Reconstruct is Decode(Encode means), and Interpolate
// decodes the straight line between two means (both ends included).
// Tolerance 1e-12 relative: the same float64 arithmetic through graphs of
// different batch sizes.
func TestInterpolateAndReconstruct(t *testing.T) {
	ctx := context.Background()
	data := binarySet(t, 6, 12, 2)
	m := trainedSmallMLP(t, data)
	mean, _, err := m.Encode(ctx, data)
	if err != nil {
		t.Fatal(err)
	}
	rec, err := m.Reconstruct(ctx, data)
	if err != nil {
		t.Fatal(err)
	}
	dec, err := m.Decode(ctx, mean, nil)
	if err != nil {
		t.Fatal(err)
	}
	if !mat.EqualApprox(rec, dec, 1e-12) {
		t.Error("Reconstruct differs from Decode of the posterior means")
	}
	const i, j, steps = 1, 4, 5
	line, err := m.Interpolate(ctx, data, i, j, steps)
	if err != nil {
		t.Fatal(err)
	}
	if r, c := line.Dims(); r != steps || c != 12 {
		t.Fatalf("Interpolate: %d x %d", r, c)
	}
	z := mat.NewDense(steps, 3, nil)
	for s := 0; s < steps; s++ {
		w := float64(s) / (steps - 1)
		for d := 0; d < 3; d++ {
			z.Set(s, d, (1-w)*mean.At(i, d)+w*mean.At(j, d))
		}
	}
	want, err := m.Decode(ctx, z, nil)
	if err != nil {
		t.Fatal(err)
	}
	if !mat.EqualApprox(line, want, 1e-12) {
		t.Error("Interpolate differs from decoding the line between the means")
	}
	if !mat.EqualApprox(line.RowView(0), rec.RowView(i), 1e-12) || !mat.EqualApprox(line.RowView(steps-1), rec.RowView(j), 1e-12) {
		t.Error("Interpolate's ends are not the reconstructions of the two records")
	}
	for r := 0; r < 6; r++ {
		for c := 0; c < 12; c++ {
			if v := rec.At(r, c); !(v > 0 && v < 1) {
				t.Fatalf("Bernoulli mean (%d, %d) = %v, not in (0, 1)", r, c, v)
			}
		}
	}
}

// TestFloat32RangeInput feeds a value that is finite in float64 but beyond
// the float32 range (1e39 > math.MaxFloat32, about 3.4e38; IEEE 754
// binary32) to a float32 model. Every inference call must refuse it with
// an error naming the record and feature, instead of returning NaN. A
// float64 model takes the same value.
func TestFloat32RangeInput(t *testing.T) {
	ctx := context.Background()
	rows := binaryRows(4, 12, 3)
	rows[2][5] = 1e39
	data, err := dataset.FromRows(rows)
	if err != nil {
		t.Fatal(err)
	}
	m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Seed: 1}) // float32, the default
	if err != nil {
		t.Fatal(err)
	}
	calls := map[string]func() error{
		"Score":       func() error { _, err := m.Score(ctx, data, ScoreOptions{K: 3}); return err },
		"Score mean":  func() error { _, err := m.Score(ctx, data, ScoreOptions{AtPosteriorMean: true}); return err },
		"Evaluate":    func() error { _, err := m.Evaluate(ctx, data, EvalOptions{K: 2}); return err },
		"Encode":      func() error { _, _, err := m.Encode(ctx, data); return err },
		"Reconstruct": func() error { _, err := m.Reconstruct(ctx, data); return err },
		"Interpolate": func() error { _, err := m.Interpolate(ctx, data, 2, 0, 3); return err },
	}
	for name, call := range calls {
		wantErr(t, name+" with 1e39 in float32", call(), dataset.ErrInvalidData, "record 2", "feature 5", "1e+39", "float32")
	}
	z := mat.NewDense(2, 3, []float64{0, 0, 0, 0, 0, -1e39})
	_, err = m.Decode(ctx, z, nil)
	wantErr(t, "Decode z of -1e39 in float32", err, layers.ErrInvalidArgument, "row 1", "column 2", "float32")

	// The largest float32 itself is representable, so not refused.
	rows[2][5] = math.MaxFloat32
	edge, err := dataset.FromRows(rows)
	if err != nil {
		t.Fatal(err)
	}
	if err := m.checkData("Score", edge); err != nil {
		t.Errorf("math.MaxFloat32 refused: %v", err)
	}

	m64 := smallMLP(t, 1)
	scores, err := m64.Score(ctx, data, ScoreOptions{K: 2})
	if err != nil {
		t.Fatalf("float64 model: %v", err)
	}
	for r, s := range scores {
		if math.IsNaN(s) {
			t.Errorf("float64 model: record %d scores NaN", r)
		}
	}
}
