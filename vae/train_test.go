package vae

import (
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"strings"
	"testing"

	"gonum.org/v1/gonum/floats"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
	"lowerbound.dev/vae/schedule"
)

// Both training paths: the lean one (no graph) and the graphs.
func TestTrainSameSeedSameBits(t *testing.T) {
	for _, graph := range []bool{false, true} {
		t.Run(fmt.Sprintf("graph=%t", graph), func(t *testing.T) { trainSameSeedSameBits(t, graph) })
	}
}

func trainSameSeedSameBits(t *testing.T, graph bool) {
	ctx := context.Background()
	data := binarySet(t, 20, 12, 1)
	valid := binarySet(t, 5, 12, 2)
	cfg := TrainConfig{Epochs: 2, BatchSize: 6, LearnRate: 0.01, Seed: 3, Validation: valid}

	a, b, c := smallMLP(t, 1), smallMLP(t, 1), smallMLP(t, 1)
	a.graphTrain, b.graphTrain, c.graphTrain = graph, graph, graph
	wantBuilds := int64(0) // the lean path compiles no graph
	if graph {
		wantBuilds = 1
	}
	if ok, _ := sameBits(a, paramBits(a), paramBits(b)); !ok {
		t.Fatal("two models from the same initialisation seed differ before training")
	}
	start := paramBits(a)
	builds := a.builds[kindTrain].Load()
	ha, err := a.Train(ctx, data, cfg)
	if err != nil {
		t.Fatal(err)
	}
	// 20 records in batches of 6 make 4 steps per epoch, the last one
	// ragged (2 records); 2 epochs and a validation pass each must still
	// compile exactly one training graph on the graph path.
	if got := a.builds[kindTrain].Load() - builds; got != wantBuilds {
		t.Errorf("Train compiled %d training graphs, want %d", got, wantBuilds)
	}
	if len(ha) != 2 || ha[0].Steps != 4 || ha[1].Steps != 4 {
		t.Fatalf("history %+v, want 2 epochs of 4 steps", ha)
	}
	hb, err := b.Train(ctx, data, cfg)
	if err != nil {
		t.Fatal(err)
	}
	if ok, name := sameBits(a, paramBits(a), paramBits(b)); !ok {
		t.Errorf("same seed, different parameter %s after training", name)
	}
	for i := range ha {
		if ha[i].Loss != hb[i].Loss || ha[i].Validation != hb[i].Validation {
			t.Errorf("epoch %d: same seed, losses %v/%v, validation %v/%v", i+1, ha[i].Loss, hb[i].Loss, ha[i].Validation, hb[i].Validation)
		}
	}
	if ok, _ := sameBits(a, start, paramBits(a)); ok {
		t.Fatal("training did not change the parameters")
	}

	cfg.Seed = 4
	builds = c.builds[kindTrain].Load()
	if _, err := c.Train(ctx, data, cfg); err != nil {
		t.Fatal(err)
	}
	if ok, _ := sameBits(a, paramBits(a), paramBits(c)); ok {
		t.Error("different training seeds gave bit-identical parameters")
	}
	if got := c.builds[kindTrain].Load() - builds; got != wantBuilds {
		t.Errorf("Train compiled %d training graphs, want %d", got, wantBuilds)
	}
}

// TestRaggedBatchMatchesExactBatch runs the last batch of a 7-record set
// (records 4, 5, 6) through the padded batch-4 training program, as Train
// does, and through a program built for exactly 3 records, and compares
// the loss terms and every gradient. The padding row gets large noise to
// show that the mask, not luck, removes it. Tolerance 1e-12 relative: the
// two programs do the same arithmetic except that the matrix products of
// the batch-4 program add exact zeros for the padding row, which a BLAS
// kernel may group differently (a few ulps at most).
func TestRaggedBatchMatchesExactBatch(t *testing.T) {
	data := binarySet(t, 7, 12, 5)
	idx := []int{4, 5, 6}
	variants := []struct {
		name  string
		key   programKey
		model func(testing.TB, uint64) *Model
	}{
		{"plain", programKey{kind: kindTrain, k: 1}, smallMLP},
		{"free bits", programKey{kind: kindTrain, k: 1, freeBits: true}, smallMLP},
		{"capacity", programKey{kind: kindTrain, k: 1, capacity: true}, smallMLP},
		{"Monte Carlo KL", programKey{kind: kindTrain, k: 1}, mixtureMLP},
		{"Monte Carlo KL with free bits", programKey{kind: kindTrain, k: 1, freeBits: true}, mixtureMLP},
	}
	for _, v := range variants {
		t.Run(v.name, func(t *testing.T) {
			m := v.model(t, 6)
			// Move away from the initialisation (zero biases) first.
			if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 2, BatchSize: 3, LearnRate: 0.02, Seed: 1}); err != nil {
				t.Fatal(err)
			}
			rng := rand.New(rand.NewPCG(8, 8))
			eps := make([]float64, 3*m.Latent())
			for i := range eps {
				eps[i] = rng.NormFloat64()
			}
			run := func(batch int) *program {
				key := v.key
				key.batch = batch
				p, err := m.build(key)
				if err != nil {
					t.Fatalf("build(batch %d): %v", batch, err)
				}
				if err := m.fillInputs(p, data, idx); err != nil {
					t.Fatal(err)
				}
				e := p.eps.Data().([]float64)
				copy(e, eps)
				for i := len(eps); i < len(e); i++ {
					e[i] = 5 // padding noise, must not matter
				}
				p.mask.Zero()
				for i := range idx {
					setAt(p.mask, i, 1)
				}
				for _, s := range []struct {
					n *G.Node
					v float64
				}{{p.invCount, 1.0 / 3}, {p.beta, 0.8}, {p.capTarget, 1.5}, {p.capGamma, 2}, {p.lambda, 0.3}} {
					if s.n != nil {
						if err := setScalar(s.n, s.v); err != nil {
							t.Fatal(err)
						}
					}
				}
				if err := p.run(); err != nil {
					t.Fatalf("run(batch %d): %v", batch, err)
				}
				return p
			}
			p4, p3 := run(4), run(3)
			for _, term := range []struct {
				name   string
				n4, n3 *G.Node
			}{{"loss", p4.loss, p3.loss}, {"reconstruction", p4.recon, p3.recon}, {"KL", p4.klAvg, p3.klAvg}} {
				a, b := p4.scalarValue(term.n4), p3.scalarValue(term.n3)
				if !relClose(a, b, 1e-12) || math.IsNaN(a) {
					t.Errorf("%s: padded batch %.17g, exact batch %.17g", term.name, a, b)
				}
			}
			if len(p4.paramNodes) != len(p3.paramNodes) || len(p4.paramNodes) != len(m.params) {
				t.Fatalf("parameter nodes: %d and %d, model has %d", len(p4.paramNodes), len(p3.paramNodes), len(m.params))
			}
			nonzero := 0
			for i, n4 := range p4.paramNodes {
				n3 := p3.paramNodes[i]
				if n4.Name() != n3.Name() {
					t.Fatalf("parameter %d: %s vs %s", i, n4.Name(), n3.Name())
				}
				g4, err4 := n4.Grad()
				g3, err3 := n3.Grad()
				if err4 != nil || err3 != nil {
					t.Fatalf("%s: gradient: %v, %v", n4.Name(), err4, err3)
				}
				a, b := g4.Data().([]float64), g3.Data().([]float64)
				for j := range a {
					if !relClose(a[j], b[j], 1e-12) {
						t.Errorf("%s[%d]: gradient %.17g with padding, %.17g without", n4.Name(), j, a[j], b[j])
						break
					}
					if a[j] != 0 {
						nonzero++
					}
				}
			}
			if nonzero == 0 {
				t.Error("every gradient is zero; the comparison is empty")
			}
		})
	}
}

func TestTrainCancelInOnStep(t *testing.T) {
	m := smallMLP(t, 1)
	data := binarySet(t, 7, 12, 1)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var steps []int
	hist, err := m.Train(ctx, data, TrainConfig{Epochs: 3, BatchSize: 2, Seed: 1, OnStep: func(s StepInfo) {
		steps = append(steps, s.Step)
		if s.Step == 5 {
			cancel()
		}
	}})
	if !errors.Is(err, context.Canceled) {
		t.Fatalf("Train after cancel: error %v, want context.Canceled", err)
	}
	// 7 records in batches of 2: 4 steps per epoch, so step 5 is the
	// second step of epoch 2 and only epoch 1 is complete.
	if len(hist) != 1 || hist[0].Epoch != 1 || hist[0].Steps != 4 {
		t.Errorf("partial history %+v, want epoch 1 of 4 steps", hist)
	}
	if len(steps) != 6 || steps[5] != 5 {
		t.Errorf("OnStep saw steps %v, want 0..5", steps)
	}
}

// TestTrainCallbacks checks the numbers the trainer reports: each step's
// loss is its reconstruction plus beta times its KL (the beta-weighted
// negative ELBO, Higgins et al. 2017, eq. 4, from memory), the epoch terms are the
// record-weighted means of the step terms, and steps count up across
// epochs.
func TestTrainCallbacks(t *testing.T) {
	m := smallMLP(t, 2)
	data := binarySet(t, 7, 12, 3)
	const beta = 0.5
	var steps []StepInfo
	var epochs []EpochInfo
	hist, err := m.Train(context.Background(), data, TrainConfig{Epochs: 2, BatchSize: 3, Seed: 2,
		Beta:    constBeta(beta),
		OnStep:  func(s StepInfo) { steps = append(steps, s) },
		OnEpoch: func(e EpochInfo) error { epochs = append(epochs, e); return nil }})
	if err != nil {
		t.Fatal(err)
	}
	if len(steps) != 6 || len(epochs) != 2 || len(hist) != 2 {
		t.Fatalf("%d steps, %d OnEpoch calls, history of %d; want 6, 2, 2", len(steps), len(epochs), len(hist))
	}
	sizes := []float64{3, 3, 1} // 7 records in batches of 3
	for i, s := range steps {
		if s.Step != i || s.Epoch != i/3+1 {
			t.Errorf("step %d reported as epoch %d, step %d", i, s.Epoch, s.Step)
		}
		if s.Beta != beta {
			t.Errorf("step %d: Beta %v, want %v", i, s.Beta, beta)
		}
		// reference: the beta-weighted objective, Higgins et al. 2017, eq. 4
		if !relClose(s.Loss, s.Reconstruction+beta*s.KL, 1e-12) {
			t.Errorf("step %d: Loss %.17g, Reconstruction + beta*KL %.17g", i, s.Loss, s.Reconstruction+beta*s.KL)
		}
		if !(s.SamplesPerSec > 0) || math.IsInf(s.SamplesPerSec, 0) {
			t.Errorf("step %d: SamplesPerSec %v", i, s.SamplesPerSec)
		}
		if !(s.KL >= 0) || !(s.Reconstruction > 0) {
			t.Errorf("step %d: KL %v, Reconstruction %v; a closed-form KL is >= 0 and a Bernoulli NLL > 0", i, s.KL, s.Reconstruction)
		}
	}
	for e := range hist {
		var loss, rec, kl float64
		for i, c := range sizes {
			s := steps[e*3+i]
			loss += s.Loss * c / 7
			rec += s.Reconstruction * c / 7
			kl += s.KL * c / 7
		}
		h := hist[e]
		if h.Epoch != e+1 || h.Steps != 3 || h.Beta != beta || !h.Best || !math.IsNaN(h.Validation) {
			t.Errorf("epoch %d: %+v", e+1, h)
		}
		if !relClose(h.Loss, loss, 1e-12) || !relClose(h.Reconstruction, rec, 1e-12) || !relClose(h.KL, kl, 1e-12) {
			t.Errorf("epoch %d: loss %v, rec %v, KL %v; record-weighted step means %v, %v, %v", e+1, h.Loss, h.Reconstruction, h.KL, loss, rec, kl)
		}
		if !(h.SamplesPerSec > 0) {
			t.Errorf("epoch %d: SamplesPerSec %v", e+1, h.SamplesPerSec)
		}
		if epochs[e].Epoch != h.Epoch || epochs[e].Loss != h.Loss {
			t.Errorf("epoch %d: OnEpoch saw %+v, history has %+v", e+1, epochs[e], h)
		}
	}
}

// constBeta is a user-written Beta (not a schedule.Constant), to show any
// implementation works.
type constBeta float64

func (c constBeta) At(int) float64 { return float64(c) }

func TestOnEpochErrorStops(t *testing.T) {
	m := smallMLP(t, 1)
	data := binarySet(t, 7, 12, 1)
	stop := errors.New("enough")
	var nSteps int
	hist, err := m.Train(context.Background(), data, TrainConfig{Epochs: 5, BatchSize: 4, Seed: 1,
		OnStep: func(StepInfo) { nSteps++ },
		OnEpoch: func(e EpochInfo) error {
			if e.Epoch == 2 {
				return stop
			}
			return nil
		}})
	if !errors.Is(err, stop) {
		t.Fatalf("error %v, want the OnEpoch error", err)
	}
	if len(hist) != 2 || nSteps != 4 {
		t.Errorf("history of %d epochs and %d steps, want 2 and 4", len(hist), nSteps)
	}
}

// nanBeta is a Beta that returns NaN at one step, which makes the loss
// NaN while reconstruction and KL stay finite.
type nanBeta struct{ at int }

func (b nanBeta) At(step int) float64 {
	if step == b.at {
		return math.NaN()
	}
	return 1
}

func TestNaNStopsTraining(t *testing.T) {
	ctx := context.Background()
	data := binarySet(t, 12, 12, 4) // batches of 2: 6 steps per epoch
	dir := t.TempDir()
	path := dir + "/model.safetensors"

	// A previous good run leaves a checkpoint.
	prev := smallMLP(t, 99)
	if _, err := prev.Train(ctx, data, TrainConfig{Epochs: 1, BatchSize: 4, Seed: 1, CheckpointPath: path}); err != nil {
		t.Fatal(err)
	}
	good := readFile(t, path)

	bad := smallMLP(t, 1)
	hist, err := bad.Train(ctx, data, TrainConfig{Epochs: 3, BatchSize: 2, Seed: 7, Beta: nanBeta{5}, CheckpointPath: path})
	wantErr(t, "Train with a NaN beta", err, ErrNonFinite, "step 5", "loss")
	if len(hist) != 0 {
		t.Errorf("history %+v; step 5 is in epoch 1, nothing completed", hist)
	}

	// The same run cancelled right after step 4 must leave the same bits.
	ref := smallMLP(t, 1)
	cctx, cancel := context.WithCancel(ctx)
	defer cancel()
	_, err = ref.Train(cctx, data, TrainConfig{Epochs: 3, BatchSize: 2, Seed: 7, Beta: nanBeta{5},
		OnStep: func(s StepInfo) {
			if s.Step == 4 {
				cancel()
			}
		}})
	if !errors.Is(err, context.Canceled) {
		t.Fatalf("reference run: %v, want context.Canceled", err)
	}
	if ok, name := sameBits(bad, paramBits(bad), paramBits(ref)); !ok {
		t.Errorf("after the NaN step parameter %s differs from the run stopped after step 4", name)
	}
	if got := readFile(t, path); string(got) != string(good) {
		t.Errorf("the failed run changed the checkpoint (%d bytes, was %d)", len(got), len(good))
	}
	assertDirHolds(t, dir, "model.safetensors")

	// A failure in epoch 2 keeps the checkpoint epoch 1 of the same run wrote.
	var afterEpoch1 []byte
	again := smallMLP(t, 1)
	_, err = again.Train(ctx, data, TrainConfig{Epochs: 3, BatchSize: 2, Seed: 7, Beta: nanBeta{8}, CheckpointPath: path,
		OnEpoch: func(e EpochInfo) error {
			afterEpoch1 = readFile(t, path)
			return nil
		}})
	wantErr(t, "Train with a NaN beta at step 8", err, ErrNonFinite, "step 8", "epoch 2")
	if afterEpoch1 == nil || string(afterEpoch1) == string(good) {
		t.Fatal("epoch 1 did not write a new checkpoint")
	}
	if got := readFile(t, path); string(got) != string(afterEpoch1) {
		t.Error("the failure in epoch 2 changed the checkpoint written after epoch 1")
	}
	assertDirHolds(t, dir, "model.safetensors")
}

func TestBetaScheduleInTrainer(t *testing.T) {
	m := smallMLP(t, 1)
	data := binarySet(t, 7, 12, 1)
	warm := schedule.LinearWarmup{Start: 0.1, End: 1, Steps: 5}
	var seen []StepInfo
	if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 2, BatchSize: 2, Seed: 1, Beta: warm,
		OnStep: func(s StepInfo) { seen = append(seen, s) }}); err != nil {
		t.Fatal(err)
	}
	if len(seen) != 8 {
		t.Fatalf("%d steps, want 8", len(seen))
	}
	for _, s := range seen {
		// reference: the linear KL warm-up (Bowman et al. 2016, section
		// 3.1; the linear ramp is common practice), written out here.
		want := warm.End
		if s.Step < warm.Steps {
			want = warm.Start + (warm.End-warm.Start)*float64(s.Step)/float64(warm.Steps)
		}
		if s.Beta != warm.At(s.Step) || !relClose(s.Beta, want, 1e-15) {
			t.Errorf("step %d: Beta %v, schedule %v, closed form %v", s.Step, s.Beta, warm.At(s.Step), want)
		}
		// reference: the beta-weighted objective, Higgins et al. 2017, eq. 4
		if !relClose(s.Loss, s.Reconstruction+s.Beta*s.KL, 1e-12) {
			t.Errorf("step %d: Loss %v, Reconstruction + beta*KL %v", s.Step, s.Loss, s.Reconstruction+s.Beta*s.KL)
		}
	}
}

// readFile returns the bytes of path.
func readFile(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// assertDirHolds fails unless dir holds exactly the named files (no
// temporary files left behind).
func assertDirHolds(t *testing.T, dir string, names ...string) {
	t.Helper()
	entries, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	want := map[string]bool{}
	for _, n := range names {
		want[n] = true
	}
	for _, e := range entries {
		if !want[e.Name()] {
			t.Errorf("%s holds an unexpected file %s", dir, e.Name())
		}
		delete(want, e.Name())
	}
	for n := range want {
		t.Errorf("%s lacks %s", dir, n)
	}
}

// TestFreeBitsInTrainer: with a floor far above any dimension's KL every
// dimension is clamped, so the KL term is the constant D*Lambda (Kingma et
// al. 2016, free bits: sum_j max(lambda, KL_j)). With a prior that has no
// closed-form KL the floor applies to the total, D*Lambda, with the same
// result.
func TestFreeBitsInTrainer(t *testing.T) {
	data := binarySet(t, 7, 12, 1)
	const beta = 0.7
	cases := []struct {
		name   string
		model  func(testing.TB, uint64) *Model
		lambda float64
	}{
		{"closed-form KL", smallMLP, 50},
		{"Monte Carlo KL", mixtureMLP, 50},
		{"Monte Carlo KL, low floor", mixtureMLP, 0.05},
	}
	for _, tc := range cases {
		m := tc.model(t, 1)
		var seen []StepInfo
		if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 2, BatchSize: 3, Seed: 1, Beta: schedule.Constant{Value: beta},
			FreeBits: schedule.FreeBits{Lambda: tc.lambda}, OnStep: func(s StepInfo) { seen = append(seen, s) }}); err != nil {
			t.Fatalf("%s: %v", tc.name, err)
		}
		floor := float64(m.Latent()) * tc.lambda
		above := 0
		for _, s := range seen {
			if s.KL > floor {
				above++
			}
			// reference: free bits, Kingma et al. 2016 (from memory):
			// sum_j max(lambda, KL_j). With the huge floor every max
			// picks lambda, which sums to D*lambda; the total floor of
			// the Monte Carlo path is max(KL, D*lambda).
			want := s.Reconstruction + beta*math.Max(s.KL, floor)
			if !relClose(s.Loss, want, 1e-12) {
				t.Errorf("%s, step %d: Loss %.17g, Reconstruction + beta*max(KL, D*lambda) %.17g", tc.name, s.Step, s.Loss, want)
			}
		}
		if tc.lambda < 1 && above == 0 {
			t.Errorf("%s: fixture: no step has a KL above the floor %v", tc.name, floor)
		}
		if tc.lambda > 1 && above > 0 {
			t.Errorf("%s: fixture: %d steps have a KL above the floor %v", tc.name, above, floor)
		}
	}
}

// TestCapacityInTrainer checks the loss against the controlled-capacity
// objective of Burgess et al. 2018 (section 5, from memory): beta*KL +
// gamma*|KL - C| with C rising linearly from 0 to Max over Steps steps,
// written out here rather than taken from schedule.Capacity.
func TestCapacityInTrainer(t *testing.T) {
	data := binarySet(t, 7, 12, 1)
	capacity := schedule.Capacity{Gamma: 3, Max: 4, Steps: 5}
	target := func(step int) float64 { return capacity.Max * math.Min(float64(step)/float64(capacity.Steps), 1) }
	for _, beta := range []schedule.Beta{nil, schedule.Constant{Value: 0.5}} {
		m := smallMLP(t, 1)
		var seen []StepInfo
		if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 2, BatchSize: 2, Seed: 1, Beta: beta, Capacity: capacity,
			OnStep: func(s StepInfo) { seen = append(seen, s) }}); err != nil {
			t.Fatal(err)
		}
		if len(seen) != 8 {
			t.Fatalf("%d steps, want 8", len(seen))
		}
		wantBeta := 0.0 // documented default with Capacity
		if beta != nil {
			wantBeta = beta.At(0)
		}
		for _, s := range seen {
			if s.Beta != wantBeta {
				t.Errorf("step %d: Beta %v, want %v", s.Step, s.Beta, wantBeta)
			}
			// reference: Burgess et al. 2018, section 5 (from memory)
			want := s.Reconstruction + wantBeta*s.KL + capacity.Gamma*math.Abs(s.KL-target(s.Step))
			if !relClose(s.Loss, want, 1e-12) {
				t.Errorf("beta %v, step %d: Loss %.17g, want %.17g", wantBeta, s.Step, s.Loss, want)
			}
		}
	}
}

// TestClipNorm: one SGD step with learning rate 1 moves the parameters by
// exactly the clipped gradient, so the change has L2 norm ClipNorm (gonum
// floats.Norm) and points the same way as the unclipped step.
func TestClipNorm(t *testing.T) {
	data := binarySet(t, 8, 12, 1)
	step := func(clip float64) []float64 {
		m := smallMLP(t, 1)
		before := flatParams(m)
		if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 1, BatchSize: 8, Optimizer: SGD, LearnRate: 1, ClipNorm: clip, Seed: 1}); err != nil {
			t.Fatal(err)
		}
		after := flatParams(m)
		floats.Sub(after, before)
		return after
	}
	const clip = 1e-6
	clipped, free, loose := step(clip), step(0), step(1e6)
	// reference: gonum floats.Norm, the L2 norm
	n, nFree := floats.Norm(clipped, 2), floats.Norm(free, 2)
	if !(n > 0) || n > clip*(1+1e-9) {
		t.Errorf("clipped step has norm %v, want in (0, %v]", n, clip)
	}
	if nFree <= clip {
		t.Fatalf("fixture: the unclipped step has norm %v, not above %v", nFree, clip)
	}
	// Same direction: clipped = free * clip/|free|. Each parameter is at
	// most about 1 in size, so subtracting it back costs at most ~2e-16
	// per element; 1e-14 absolute leaves room.
	for i := range free {
		if want := free[i] * clip / nFree; math.Abs(clipped[i]-want) > 1e-14 {
			t.Fatalf("element %d of the clipped step: %v, the rescaled free step %v", i, clipped[i], want)
		}
	}
	for i := range free {
		if loose[i] != free[i] {
			t.Fatalf("a clip norm far above the gradient's norm changed element %d: %v vs %v", i, loose[i], free[i])
		}
	}
}

// TestRestoreBestAndPatience trains with a learning rate high enough that
// the validation negative ELBO goes up and down.
func TestRestoreBestAndPatience(t *testing.T) {
	if testing.Short() {
		t.Skip("trains several models")
	}
	ctx := context.Background()
	data := binarySet(t, 40, 12, 1)
	valid := binarySet(t, 10, 12, 2)
	base := TrainConfig{Epochs: 10, BatchSize: 5, LearnRate: 0.2, Seed: 3, Validation: valid}

	dir := t.TempDir()
	path := dir + "/best.safetensors"
	m := smallMLP(t, 1)
	cfg := base
	cfg.RestoreBest = true
	cfg.CheckpointPath = path
	hist, err := m.Train(ctx, data, cfg)
	if err != nil {
		t.Fatal(err)
	}
	if len(hist) != cfg.Epochs {
		t.Fatalf("%d epochs without patience, want %d", len(hist), cfg.Epochs)
	}
	hist0 := hist
	best, bestAt := math.Inf(1), -1
	for i, h := range hist {
		improved := h.Validation < best
		if h.Best != improved {
			t.Errorf("epoch %d: Best %v, but validation %v against the best so far %v", h.Epoch, h.Best, h.Validation, best)
		}
		if improved {
			best, bestAt = h.Validation, i
		}
	}
	if bestAt == len(hist)-1 {
		t.Fatalf("fixture: the last epoch is the best (%v); RestoreBest is not exercised", hist)
	}
	rep, err := m.Evaluate(ctx, valid, EvalOptions{K: 1, Seed: cfg.Seed})
	if err != nil {
		t.Fatal(err)
	}
	if rep.NegELBO != best {
		t.Errorf("after RestoreBest the validation negative ELBO is %.17g, the best epoch had %.17g", rep.NegELBO, best)
	}
	saved, err := Load(path)
	if err != nil {
		t.Fatal(err)
	}
	if ok, name := sameBits(m, paramBits(m), paramBits(saved)); !ok {
		t.Errorf("the checkpoint of the best epoch differs from the restored parameters at %s", name)
	}

	// Patience: training stops at the first epoch that makes the count of
	// epochs since the best reach Patience, and not before.
	for _, patience := range []int{1, 2} {
		m := smallMLP(t, 1)
		cfg := base
		cfg.Patience = patience
		hist, err := m.Train(ctx, data, cfg)
		if err != nil {
			t.Fatal(err)
		}
		best, since, stopAt := math.Inf(1), 0, cfg.Epochs
		for i, h := range hist {
			if h.Validation < best {
				best, since = h.Validation, 0
			} else {
				since++
			}
			if since >= patience {
				stopAt = i + 1
				break
			}
		}
		if len(hist) != stopAt {
			t.Errorf("patience %d: trained %d epochs, the history says it should stop after %d", patience, len(hist), stopAt)
		}
		if patience == 1 && (len(hist) >= cfg.Epochs || hist[len(hist)-1].Best) {
			t.Errorf("patience 1: %d epochs, last Best %v; want a stop at the first non-improving epoch", len(hist), hist[len(hist)-1].Best)
		}
		// Same seed and data as the full run: the same epochs, bit for bit.
		full := hist0
		for i, h := range hist {
			if h.Validation != full[i].Validation {
				t.Errorf("patience %d, epoch %d: validation %v, the full run had %v", patience, i+1, h.Validation, full[i].Validation)
			}
		}
	}
}

// TestNonFiniteUpdateRestoresParameters: a learning rate so large that the
// update itself overflows (the loss before it is finite) stops training
// with ErrNonFinite naming a parameter, and every parameter is finite and
// equal, bit for bit, to its value after the last good step: the same run
// cancelled right after that step (or the untrained model when the very
// first update fails). float32 Adam with 1e39 (above math.MaxFloat32,
// about 3.4e38, IEEE 754 binary32) and float64 SGD with 1e300.
func TestNonFiniteUpdateRestoresParameters(t *testing.T) {
	data := binarySet(t, 8, 12, 4)
	// A Gaussian likelihood with sigma 1e-5 on 0/1 data has gradients of
	// order 1e10 (the score (x - mean)/sigma^2), so SGD's first update of
	// 1e300 times that overflows; with the Bernoulli likelihood the first
	// update stays finite and the loss of the second step is what fails.
	cases := []struct {
		name       string
		dtype      tensor.Dtype
		opt        Optimizer
		lr         float64
		likelihood losses.Likelihood
		wantUpdate bool // the failure is in the update, not the loss
	}{
		{"float32 Adam 1e39", tensor.Float32, Adam, 1e39, nil, true},
		{"float64 SGD 1e300", tensor.Float64, SGD, 1e300, losses.Gaussian{Sigma: 1e-5}, true},
		{"float64 SGD 1e300, Bernoulli", tensor.Float64, SGD, 1e300, nil, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			model := func() *Model {
				m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Dtype: tc.dtype, Seed: 5, Likelihood: tc.likelihood})
				if err != nil {
					t.Fatal(err)
				}
				return m
			}
			cfg := TrainConfig{Epochs: 3, BatchSize: 4, Optimizer: tc.opt, LearnRate: tc.lr, Seed: 9}
			m := model()
			last := -1
			cfg.OnStep = func(s StepInfo) { last = s.Step }
			_, err := m.Train(context.Background(), data, cfg)
			if !errors.Is(err, ErrNonFinite) {
				t.Fatalf("Train: %v, want ErrNonFinite", err)
			}
			t.Logf("stopped after %d good steps: %v", last+1, err)
			if got := strings.Contains(err.Error(), "update of parameter"); got != tc.wantUpdate {
				t.Errorf("fixture: error %q; want a failed update: %v", err, tc.wantUpdate)
			}
			for _, p := range m.Params() {
				for j, v := range denseFloats(p.Value) {
					if math.IsNaN(v) || math.IsInf(v, 0) {
						t.Fatalf("parameter %s[%d] is %v after ErrNonFinite", p.Name, j, v)
					}
				}
			}
			ref := model()
			if last >= 0 {
				ctx, cancel := context.WithCancel(context.Background())
				defer cancel()
				cfg.OnStep = func(s StepInfo) {
					if s.Step == last {
						cancel()
					}
				}
				if _, err := ref.Train(ctx, data, cfg); !errors.Is(err, context.Canceled) {
					t.Fatalf("reference run: %v, want context.Canceled", err)
				}
			}
			if ok, name := sameBits(m, paramBits(m), paramBits(ref)); !ok {
				t.Errorf("parameter %s differs from its value after the last good step %d", name, last)
			}
		})
	}
}
