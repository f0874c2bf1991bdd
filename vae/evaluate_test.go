package vae

import (
	"context"
	"errors"
	"math"
	"testing"

	"gonum.org/v1/gonum/floats"
)

// TestSampledRunsBounded checks that Score and Evaluate split a large K
// into chunks: no program run handles more rows (batch times samples)
// than the bound, every record still gets all K samples, and K = 2^28
// (which needed gigabytes in one run) starts in bounded memory and stops
// on cancellation.
func TestSampledRunsBounded(t *testing.T) {
	ctx := context.Background()
	m := smallMLP(t, 1)
	data := binarySet(t, 3, 12, 1)
	const rows, k = 8, 29
	var runs []programKey
	lim := inferLimits{sampleRows: rows, beforeRun: func(key programKey) { runs = append(runs, key) }}
	if _, err := m.score(ctx, data, ScoreOptions{K: k, Seed: 1}, lim); err != nil {
		t.Fatal(err)
	}
	if _, err := m.evaluate(ctx, data, EvalOptions{K: k, Seed: 1}, lim); err != nil {
		t.Fatal(err)
	}
	samples := 0
	for _, key := range runs {
		if key.batch*key.k > rows || key.k < 2 {
			t.Errorf("a run of batch %d with %d samples: want at most %d rows and at least 2 samples", key.batch, key.k, rows)
		}
		samples += key.batch * key.k
	}
	// Batch 1 (8 rows hold no two records of 29 samples): each record's
	// 29 samples, twice (Score and Evaluate), and no padding rows.
	if want := 2 * data.Len() * k; samples != want {
		t.Errorf("%d sample rows run, want %d", samples, want)
	}

	// K = 2^28 on two records at the default bound: cancel after three
	// runs. Before chunking this allocated 2^28*(F+D) values for one run.
	two := binarySet(t, 2, 12, 2)
	for _, call := range []string{"Score", "Evaluate"} {
		cctx, cancel := context.WithCancel(ctx)
		n := 0
		lim := defaultInferLimits()
		lim.beforeRun = func(key programKey) {
			if key.batch*key.k > maxSampleRows {
				t.Errorf("%s: a run of batch %d with %d samples, over %d rows", call, key.batch, key.k, maxSampleRows)
			}
			if n++; n == 3 {
				cancel()
			}
		}
		var err error
		if call == "Score" {
			_, err = m.score(cctx, two, ScoreOptions{K: 1 << 28}, lim)
		} else {
			_, err = m.evaluate(cctx, two, EvalOptions{K: 1 << 28}, lim)
		}
		cancel()
		if !errors.Is(err, context.Canceled) {
			t.Errorf("%s with K = 2^28, cancelled: %v", call, err)
		}
		if n != 3 {
			t.Errorf("%s with K = 2^28: %d runs, want 3 (the context is checked before every run)", call, n)
		}
	}
}

// TestEvaluateCancelInsideChunks cancels Score and Evaluate during the
// first of several runs for one record chunk (one record, K split into
// chunks), and once during the first of several record chunks. Each must
// return the context's error without starting another run.
func TestEvaluateCancelInsideChunks(t *testing.T) {
	m := smallMLP(t, 1)
	one := binarySet(t, 1, 12, 1)
	many := binarySet(t, 300, 12, 1)
	cases := []struct {
		name string
		call func(context.Context, inferLimits) error
	}{
		{"Score, K chunks", func(ctx context.Context, lim inferLimits) error {
			_, err := m.score(ctx, one, ScoreOptions{K: 40}, lim)
			return err
		}},
		{"Evaluate, K chunks", func(ctx context.Context, lim inferLimits) error {
			_, err := m.evaluate(ctx, one, EvalOptions{K: 40}, lim)
			return err
		}},
		{"Evaluate, record chunks", func(ctx context.Context, lim inferLimits) error {
			_, err := m.evaluate(ctx, many, EvalOptions{K: 2}, lim)
			return err
		}},
	}
	for _, c := range cases {
		ctx, cancel := context.WithCancel(context.Background())
		runs, after := 0, 0
		lim := inferLimits{sampleRows: 8, beforeRun: func(programKey) {
			if ctx.Err() != nil {
				after++
			}
			if runs++; runs == 1 {
				cancel() // during the first run: the run itself completes
			}
		}}
		err := c.call(ctx, lim)
		cancel()
		if !errors.Is(err, context.Canceled) {
			t.Errorf("%s: cancelled during the first run, returned %v", c.name, err)
		}
		if after != 0 {
			t.Errorf("%s: %d runs started after the cancellation, want 0", c.name, after)
		}
	}
}

// TestChunkedSamplesAgree checks that splitting K into chunks (bound of
// 8 rows, so K = 37 runs as chunks of 8, 8, 7, 7, 7 samples) gives the
// results of one run of all K samples, and that the chunked
// importance-weighted score still matches the gonum recomputation of
// Burda et al. 2016, eq. 8. Tolerances: 1e-12 relative between the two
// runs (the same float64 terms, summed in another order through the
// streaming log-sum-exp), 1e-9 against gonum as in TestScoreMatchesGonum.
// The mixture prior covers the Monte Carlo KL, which is averaged over
// the chunks too.
func TestChunkedSamplesAgree(t *testing.T) {
	ctx := context.Background()
	data := binarySet(t, 5, 12, 4)
	const k, seed = 37, 6
	chunked := inferLimits{sampleRows: 8}
	for name, m := range map[string]*Model{"standard normal prior": trainedSmallMLP(t, data), "mixture prior": mixtureMLP(t, 2)} {
		whole, err := m.Score(ctx, data, ScoreOptions{K: k, Seed: seed})
		if err != nil {
			t.Fatal(err)
		}
		parts, err := m.score(ctx, data, ScoreOptions{K: k, Seed: seed}, chunked)
		if err != nil {
			t.Fatal(err)
		}
		for r := range whole {
			if !relClose(parts[r], whole[r], 1e-12) {
				t.Errorf("%s: Score(K=%d) record %d: %.15g in chunks, %.15g in one run", name, k, r, parts[r], whole[r])
			}
		}
		a, err := m.Evaluate(ctx, data, EvalOptions{K: k, Seed: seed})
		if err != nil {
			t.Fatal(err)
		}
		b, err := m.evaluate(ctx, data, EvalOptions{K: k, Seed: seed}, chunked)
		if err != nil {
			t.Fatal(err)
		}
		for _, v := range [][3]any{{"NLL", a.NLL, b.NLL}, {"Reconstruction", a.Reconstruction, b.Reconstruction}, {"KL", a.KL, b.KL}} {
			if !relClose(v[1].(float64), v[2].(float64), 1e-12) {
				t.Errorf("%s: Evaluate(K=%d) %s: %.15g in one run, %.15g in chunks", name, k, v[0], v[1], v[2])
			}
		}
		for j := range a.MeanVariance {
			if !relClose(a.MeanVariance[j], b.MeanVariance[j], 1e-12) {
				t.Errorf("%s: MeanVariance[%d] differs: %v, %v", name, j, a.MeanVariance[j], b.MeanVariance[j])
			}
		}
		if name == "standard normal prior" {
			ref := newGonumRef(t, m, data, k, seed, refModel{logLik: bernoulliRef})
			for r := range parts {
				// reference: Burda et al. 2016, eq. 8, with gonum floats.LogSumExp and distmv densities
				if want := -iwEstimate(ref.logW[r]); !relClose(parts[r], want, 1e-9) {
					t.Errorf("chunked Score(K=%d) record %d = %.15g, gonum reference %.15g", k, r, parts[r], want)
				}
			}
		}
	}
}

// TestStreamingLogSumExp checks the chunk combiner against gonum
// floats.LogSumExp, the whole slice at once, on terms whose exponentials
// underflow or overflow float64 (a naive sum would give -Inf or +Inf), in
// increasing, decreasing and mixed order, and with -Inf terms (zero
// weights). Tolerance 1e-13 relative: the two differ only in the order of
// the additions.
func TestStreamingLogSumExp(t *testing.T) {
	cases := [][]float64{
		{-1000, -1001, -999.5, -1200},
		{800, 799, 801, 700, 802.5},
		{-3, -2, -1, 0, 1, 2, 3},
		{3, 2, 1, 0, -1, -2, -3},
		{math.Inf(-1), -5, math.Inf(-1), -4},
		{0.25},
	}
	for _, terms := range cases {
		var l logSumExp
		for _, v := range terms {
			l.add(v)
		}
		// reference: gonum floats.LogSumExp
		if want := floats.LogSumExp(terms); !relClose(l.value(), want, 1e-13) {
			t.Errorf("%v: streaming %.17g, gonum %.17g", terms, l.value(), want)
		}
	}
	var none, zeros, inf, nan logSumExp
	zeros.add(math.Inf(-1))
	zeros.add(math.Inf(-1))
	inf.add(1)
	inf.add(math.Inf(1))
	inf.add(2)
	nan.add(1)
	nan.add(math.NaN())
	nan.add(math.Inf(-1))
	for _, c := range []struct {
		name string
		got  float64
		want float64
	}{{"no terms", none.value(), math.Inf(-1)}, {"only -Inf", zeros.value(), math.Inf(-1)}, {"an +Inf term", inf.value(), math.Inf(1)}} {
		if c.got != c.want {
			t.Errorf("%s: %v, want %v (log of a sum of 0, or of +Inf)", c.name, c.got, c.want)
		}
	}
	if !math.IsNaN(nan.value()) {
		t.Errorf("a NaN term: %v, want NaN", nan.value())
	}
}
