package vae

import (
	"context"
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// Conditional models follow Sohn, Lee and Yan 2015 ("Learning Structured
// Output Representation using Deep Conditional Generative Models"): the
// label enters both the encoder and the decoder.

func conditionalMLP(t testing.TB) *Model {
	t.Helper()
	m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Classes: 3, Dtype: tensor.Float64, Seed: 5})
	if err != nil {
		t.Fatalf("NewMLP: %v", err)
	}
	return m
}

func rowsDiffer(a, b *mat.Dense, i, j int) bool {
	_, c := a.Dims()
	for k := 0; k < c; k++ {
		if a.At(i, k) != b.At(j, k) {
			return true
		}
	}
	return false
}

func TestConditionalMLP(t *testing.T) {
	ctx := context.Background()
	m := conditionalMLP(t)
	if m.Classes() != 3 {
		t.Fatalf("Classes() = %d", m.Classes())
	}
	x := binarySet(t, 12, 12, 6)
	data := withLabels(t, x, []int{0, 1, 2, 0, 1, 2, 0, 1, 2, 0, 1, 2}, 3)
	if _, err := m.Train(ctx, data, TrainConfig{Epochs: 2, BatchSize: 5, LearnRate: 0.01, Seed: 1}); err != nil {
		t.Fatal(err)
	}

	// The same z under each label decodes differently.
	z := mat.NewDense(2, 3, []float64{0.3, -1, 0.5, 1.2, 0.1, -0.4})
	outs := make([]*mat.Dense, 3)
	for c := range outs {
		var err error
		if outs[c], err = m.Decode(ctx, z, []int{c, c}); err != nil {
			t.Fatalf("Decode under label %d: %v", c, err)
		}
	}
	for a := 0; a < 3; a++ {
		for b := a + 1; b < 3; b++ {
			for r := 0; r < 2; r++ {
				if !rowsDiffer(outs[a], outs[b], r, r) {
					t.Errorf("row %d decodes the same under labels %d and %d", r, a, b)
				}
			}
		}
	}
	// Mixed labels in one call give each row its own label's output.
	mixed, err := m.Decode(ctx, z, []int{2, 0})
	if err != nil {
		t.Fatal(err)
	}
	if !mat.Equal(mixed.Slice(0, 1, 0, 12), outs[2].Slice(0, 1, 0, 12)) || !mat.Equal(mixed.Slice(1, 2, 0, 12), outs[0].Slice(1, 2, 0, 12)) {
		t.Error("a call with mixed labels differs from the per-label calls")
	}
	// The label enters the encoder too.
	same, err := x.Subset([]int{0, 0, 0})
	if err != nil {
		t.Fatal(err)
	}
	mean, _, err := m.Encode(ctx, withLabels(t, same, []int{0, 1, 2}, 3))
	if err != nil {
		t.Fatal(err)
	}
	if !rowsDiffer(mean, mean, 0, 1) || !rowsDiffer(mean, mean, 1, 2) {
		t.Error("the same record under different labels has the same posterior mean")
	}
	// Score's graph and Decode agree on how labels are used (gonum
	// recomputation as in TestScoreMatchesGonum).
	checkScoresAgainst(t, m, data, refModel{logLik: bernoulliRef})

	gen, err := m.Generate(ctx, 3, []int{0, 1, 2}, 9)
	if err != nil {
		t.Fatal(err)
	}
	if r, c := gen.Dims(); r != 3 || c != 12 {
		t.Errorf("Generate: %d x %d", r, c)
	}
}

func TestLabelErrors(t *testing.T) {
	ctx := context.Background()
	cond := conditionalMLP(t)
	z := mat.NewDense(2, 3, nil)
	x := binarySet(t, 4, 12, 1)

	_, err := cond.Decode(ctx, z, []int{0, 3})
	wantErr(t, "Decode label 3", err, ErrLabel, "row 1", "3")
	_, err = cond.Decode(ctx, z, []int{-1, 0})
	wantErr(t, "Decode label -1", err, ErrLabel, "row 0")
	_, err = cond.Decode(ctx, z, nil)
	wantErr(t, "Decode without labels", err, ErrLabel, "labels")
	_, err = cond.Decode(ctx, z, []int{0})
	wantErr(t, "Decode with one label for two rows", err, ErrLabel, "labels")
	_, err = cond.Generate(ctx, 2, []int{1, 7}, 1)
	wantErr(t, "Generate label 7", err, ErrLabel, "7")
	_, err = cond.Generate(ctx, 2, nil, 1)
	wantErr(t, "Generate without labels", err, ErrLabel, "labels")

	badLabels := withLabels(t, x, []int{0, 1, 4, 2}, 5) // label 4 of a 3-class model
	_, err = cond.Score(ctx, badLabels, ScoreOptions{})
	wantErr(t, "Score with label 4", err, ErrLabel, "record 2", "4")
	_, err = cond.Evaluate(ctx, badLabels, EvalOptions{})
	wantErr(t, "Evaluate with label 4", err, ErrLabel, "record 2")
	_, _, err = cond.Encode(ctx, badLabels)
	wantErr(t, "Encode with label 4", err, ErrLabel, "record 2")
	_, err = cond.Reconstruct(ctx, badLabels)
	wantErr(t, "Reconstruct with label 4", err, ErrLabel, "record 2")
	_, err = cond.Train(ctx, badLabels, TrainConfig{Epochs: 1})
	wantErr(t, "Train with label 4", err, ErrLabel, "record 2")
	_, err = cond.Score(ctx, x, ScoreOptions{})
	wantErr(t, "Score without labels", err, ErrLabel, "labels")

	plain := smallMLP(t, 1)
	_, err = plain.Decode(ctx, z, []int{0, 1})
	wantErr(t, "Decode labels on an unconditional model", err, ErrNotConditional, "labels")
	_, err = plain.Generate(ctx, 2, []int{0, 1}, 1)
	wantErr(t, "Generate labels on an unconditional model", err, ErrNotConditional, "labels")
	if _, err := plain.Score(ctx, withLabels(t, x, []int{0, 1, 0, 1}, 2), ScoreOptions{}); err != nil {
		t.Errorf("an unconditional model should ignore data labels: %v", err)
	}
}

// TestConditionalImageModel builds an image model whose encoder is a
// convolution over the image and Classes label planes.
func TestConditionalImageModel(t *testing.T) {
	ctx := context.Background()
	opt := f64Opt(3)
	conv := must(layers.NewConv2D("enc.conv", layers.Conv2DConfig{In: 1 + 3, Out: 2, Kernel: [2]int{3, 3}, Stride: [2]int{2, 2}, Padding: [2]int{1, 1}, Activation: layers.ReLU}, opt))
	dense := must(layers.NewDense("enc.dense", 2*4*4, 16, opt))
	enc := must(layers.NewSequential("enc", conv, layers.NewFlatten("enc.flat"), dense, layers.ReLU))
	head := must(layers.NewGaussianHead("head", 16, 2, opt))
	dec := must(layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{2 + 3, 16, 64}}, opt))
	m, err := New(Config{InputShape: []int{1, 8, 8}, Encoder: enc, Head: head, Decoder: dec, Classes: 3, Dtype: tensor.Float64})
	if err != nil {
		t.Fatalf("New: %v", err)
	}
	labels := []int{2, 0, 1, 1, 0, 2, 2, 1, 0, 0}
	data := withLabels(t, binarySet(t, 10, 64, 4), labels, 3)

	// The planes tensor: record i has ones in plane labels[i], zeros in
	// the others.
	p, err := m.acquire(programKey{kind: kindEncode, batch: 4, k: 1})
	if err != nil {
		t.Fatal(err)
	}
	idx := []int{0, 1, 2}
	if err := m.fillInputs(p, data, idx); err != nil {
		t.Fatal(err)
	}
	if p.planes == nil {
		t.Fatal("the image program has no label planes")
	}
	if s := p.planes.Shape(); len(s) != 4 || s[0] != 4 || s[1] != 3 || s[2] != 8 || s[3] != 8 {
		t.Fatalf("planes shape %v, want (4, 3, 8, 8)", s)
	}
	planes := p.planes.Data().([]float64)
	for i, r := range idx {
		for c := 0; c < 3; c++ {
			want := 0.0
			if c == labels[r] {
				want = 1
			}
			for j := 0; j < 64; j++ {
				if v := planes[(i*3+c)*64+j]; v != want {
					t.Fatalf("record %d (label %d), plane %d, pixel %d: %v, want %v", r, labels[r], c, j, v, want)
				}
			}
		}
	}
	m.release(p)

	// The planes reach the encoder: one image under three labels.
	one, err := data.Subset([]int{0, 0, 0})
	if err != nil {
		t.Fatal(err)
	}
	mean, _, err := m.Encode(ctx, withLabels(t, one, []int{0, 1, 2}, 3))
	if err != nil {
		t.Fatal(err)
	}
	if !rowsDiffer(mean, mean, 0, 1) || !rowsDiffer(mean, mean, 0, 2) || !rowsDiffer(mean, mean, 1, 2) {
		t.Error("the label planes do not change the posterior")
	}

	hist, err := m.Train(ctx, data, TrainConfig{Epochs: 1, BatchSize: 4, Seed: 1})
	if err != nil {
		t.Fatalf("Train: %v", err)
	}
	if len(hist) != 1 || math.IsNaN(hist[0].Loss) {
		t.Fatalf("history %+v", hist)
	}
	gen, err := m.Generate(ctx, 3, []int{0, 1, 2}, 7)
	if err != nil {
		t.Fatalf("Generate: %v", err)
	}
	if r, c := gen.Dims(); r != 3 || c != 64 {
		t.Fatalf("Generate: %d x %d, want 3 x 64", r, c)
	}
	for i := 0; i < 3; i++ {
		for j := 0; j < 64; j++ {
			if v := gen.At(i, j); !(v > 0 && v < 1) {
				t.Fatalf("Generate (%d, %d) = %v, not a probability", i, j, v)
			}
		}
	}
	// Same seed, different labels: the same z decoded under each label.
	again, err := m.Generate(ctx, 3, []int{1, 1, 1}, 7)
	if err != nil {
		t.Fatal(err)
	}
	if !rowsDiffer(gen, again, 0, 0) || rowsDiffer(gen, again, 1, 1) || !rowsDiffer(gen, again, 2, 2) {
		t.Error("Generate with the same seed: rows should change exactly where the label changes")
	}
}
