package vae

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae/schedule"
)

// identityLayer passes its input through: with it as the encoder, the
// head sees the data itself, so a test can write the posterior out by hand.
type identityLayer struct{}

func (identityLayer) Forward(_ *layers.Scope, x *G.Node) (*G.Node, error) { return x, nil }
func (identityLayer) Params() []*layers.Param                             { return nil }

// trainRun is one run of a training program on fixed inputs.
type trainRun struct {
	loss, klTerm float64
	klDimAvg     []float64
	grads        map[string][]float64 // by parameter name
}

// runTrainProgram fills p with records idx of data, the given noise, beta
// and free-bits floor, runs it once and returns the terms and the
// gradients, then clears the gradients for the next run.
func runTrainProgram(t *testing.T, m *Model, p *program, data [][]float64, eps []float64, beta, lambda float64) trainRun {
	t.Helper()
	x := p.x.Data().([]float64)
	for i, row := range data {
		copy(x[i*m.width:], row)
	}
	copy(p.eps.Data().([]float64), eps)
	if err := p.mask.Memset(1.0); err != nil {
		t.Fatal(err)
	}
	for _, s := range []struct {
		n *G.Node
		v float64
	}{{p.invCount, 1 / float64(len(data))}, {p.beta, beta}, {p.lambda, lambda}} {
		if err := setScalar(s.n, s.v); err != nil {
			t.Fatal(err)
		}
	}
	if err := p.run(); err != nil {
		t.Fatal(err)
	}
	out := trainRun{loss: p.scalarValue(p.loss), klTerm: p.scalarValue(p.klTerm), klDimAvg: p.values(p.klDimAvg), grads: map[string][]float64{}}
	for i, n := range p.paramNodes {
		g, err := n.Grad()
		if err != nil {
			t.Fatal(err)
		}
		out.grads[p.scope.Params()[i].Name] = append([]float64(nil), g.Data().([]float64)...)
		g.(*tensor.Dense).Zero()
	}
	return out
}

// softClampRef is layers.SoftClamp written out: r + softplus(lo - r) -
// softplus(r - hi), softplus(v) = log(1 + exp(v)).
func softClampRef(r float64) float64 {
	sp := func(v float64) float64 { return math.Log1p(math.Exp(v)) }
	return r + sp(layers.LogVarMin-r) - sp(r-layers.LogVarMax)
}

// TestFreeBitsPerDimension trains nothing: it runs the training graph on a
// fixed batch where two latent dimensions have a batch-mean KL above the
// free-bits floor lambda and one below, and checks the KL term the trainer
// optimises against free bits as Kingma et al. 2016 define them (appendix,
// free bits; from memory): sum_j max(lambda, E_batch[KL_j]), each KL_j
// the closed form 0.5*(mu^2 + exp(logVar) - 1 - logVar) of Kingma and
// Welling 2014, appendix B, written out here. The encoder is the identity,
// so mu = x W_mu + b_mu and logVar = softclamp(x W_lv + b_lv) are plain
// arithmetic.
//
// The gradient of that term with respect to the head's parameters (the
// training gradient at beta = 1 minus the one at beta = 0, same inputs and
// noise) must match gonum diff/fd central differences of the reference:
// zero for every parameter of the clamped dimension, non-zero for the
// others. A floor on the total KL instead of one per dimension fails here:
// the fixture's total is above D*lambda, so the clamped dimension would get
// a gradient.
//
// The same run checks that schedule.FreeBits.Objective, given the graph's
// per-dimension batch means, gives the graph's KL term and marks the same
// dimension clamped.
func TestFreeBitsPerDimension(t *testing.T) {
	const f, d, n, lambda = 4, 3, 5, 0.3
	head := must(layers.NewGaussianHead("head", f, d, f64Opt(1)))
	dec := must(layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{d, 6, f}}, f64Opt(2)))
	m, err := New(Config{InputShape: []int{f}, Encoder: identityLayer{}, Head: head, Decoder: dec, Dtype: tensor.Float64})
	if err != nil {
		t.Fatal(err)
	}
	// Head parameters, in Params order: mean.weight (f, d), mean.bias
	// (1, d), logvar.weight (f, d), logvar.bias (1, d). Large mean biases
	// for dimensions 0 and 1, a small one for dimension 2.
	rng := rand.New(rand.NewPCG(4, 4))
	hp := head.Params()
	setParam := func(p *layers.Param, v []float64) { copy(p.Value.Data().([]float64), v) }
	small := func(k int) []float64 {
		out := make([]float64, k)
		for i := range out {
			out[i] = 0.1 * rng.NormFloat64()
		}
		return out
	}
	setParam(hp[0], small(f*d))
	setParam(hp[1], []float64{1.5, 1.2, 0.05})
	setParam(hp[2], small(f*d))
	setParam(hp[3], []float64{0.1, -0.2, 0.15})

	data := binaryRows(n, f, 3)
	eps := make([]float64, n*d)
	for i := range eps {
		eps[i] = rng.NormFloat64()
	}

	// The reference: per-dimension batch-mean KL and the free-bits term as
	// functions of the head's parameters theta (concatenated in order).
	klMeans := func(theta []float64) []float64 {
		wm, bm, wl, bl := theta[:f*d], theta[f*d:f*d+d], theta[f*d+d:2*f*d+d], theta[2*f*d+d:]
		out := make([]float64, d)
		for _, x := range data {
			for j := 0; j < d; j++ {
				mu, r := bm[j], bl[j]
				for i := 0; i < f; i++ {
					mu += x[i] * wm[i*d+j]
					r += x[i] * wl[i*d+j]
				}
				lv := softClampRef(r)
				out[j] += 0.5 * (mu*mu + math.Exp(lv) - 1 - lv) / n
			}
		}
		return out
	}
	freeBits := func(theta []float64) float64 {
		s := 0.0
		for _, kl := range klMeans(theta) {
			s += math.Max(lambda, kl)
		}
		return s
	}
	var theta []float64
	for _, p := range hp {
		theta = append(theta, p.Value.Data().([]float64)...)
	}
	ref := klMeans(theta)
	total := 0.0
	for _, v := range ref {
		total += v
	}
	// The fixture: a clear margin on each side of lambda (the difference
	// step 1e-5 cannot cross it), and a total above D*lambda.
	if !(ref[0] > lambda+0.05 && ref[1] > lambda+0.05 && ref[2] < lambda-0.05 && total > d*lambda+0.05) {
		t.Fatalf("fixture: per-dimension KL %v, lambda %v, total %v", ref, lambda, total)
	}

	p, err := m.build(programKey{kind: kindTrain, batch: n, k: 1, freeBits: true})
	if err != nil {
		t.Fatal(err)
	}
	with := runTrainProgram(t, m, p, data, eps, 1, lambda)
	without := runTrainProgram(t, m, p, data, eps, 0, lambda)

	// Values: 1e-12 relative; the graph and the reference do the same
	// few dozen operations in a different order.
	for j := range ref {
		if !relClose(with.klDimAvg[j], ref[j], 1e-12) {
			t.Errorf("batch-mean KL of dimension %d: graph %.17g, reference %.17g", j, with.klDimAvg[j], ref[j])
		}
	}
	if want := freeBits(theta); !relClose(with.klTerm, want, 1e-12) {
		t.Errorf("KL term: graph %.17g, sum_j max(lambda, KL_j) %.17g", with.klTerm, want)
	}
	// The host-side schedule.FreeBits agrees with the graph on the same
	// per-dimension values (a few ulps: max(a, b) is formed as
	// (a+b+|a-b|)/2 in the graph).
	obj, clamped, err := schedule.FreeBits{Lambda: lambda}.Objective(with.klDimAvg)
	if err != nil {
		t.Fatal(err)
	}
	if !relClose(obj, with.klTerm, 1e-14) {
		t.Errorf("schedule.FreeBits.Objective %.17g, graph KL term %.17g", obj, with.klTerm)
	}
	if clamped[0] || clamped[1] || !clamped[2] {
		t.Errorf("schedule.FreeBits.Objective clamps %v, want only dimension 2", clamped)
	}

	// Gradients of the KL term: the beta = 1 run minus the beta = 0 run.
	var got []float64
	for _, p := range hp {
		a, b := with.grads[p.Name], without.grads[p.Name]
		if a == nil {
			t.Fatalf("no gradient for %s", p.Name)
		}
		for i := range a {
			got = append(got, a[i]-b[i])
		}
	}
	// reference: gonum diff/fd central differences of the free-bits term.
	// Tolerance 1e-6 relative (floor 1e-3): the truncation error of the
	// step 1e-5 is about 1e-10 times the third derivative, which is of
	// order 1 here, and the subtraction of the two runs loses at most
	// about 1e-15 of the reconstruction gradient.
	want := fd.Gradient(nil, freeBits, theta, &fd.Settings{Formula: fd.Central, Step: 1e-5})
	column := func(idx int) int { // the latent dimension a head parameter feeds
		switch {
		case idx < f*d:
			return idx % d
		case idx < f*d+d:
			return idx - f*d
		case idx < 2*f*d+d:
			return (idx - f*d - d) % d
		default:
			return idx - 2*f*d - d
		}
	}
	moved := [d]int{}
	for i := range want {
		j := column(i)
		if !(math.Abs(got[i]-want[i]) <= 1e-6*math.Max(math.Abs(want[i]), 1e-3)) {
			t.Errorf("head parameter %d (dimension %d): KL-term gradient %.10g, finite differences %.10g", i, j, got[i], want[i])
		}
		if j == 2 {
			if got[i] != 0 || want[i] != 0 {
				t.Errorf("head parameter %d of the clamped dimension: gradient %g, finite differences %g, want 0", i, got[i], want[i])
			}
		} else if math.Abs(want[i]) > 1e-3 && math.Abs(got[i]) > 1e-3 {
			moved[j]++
		}
	}
	// Each free dimension's bias gets a gradient (so do most weights).
	if moved[0] == 0 || moved[1] == 0 {
		t.Errorf("parameters with a KL gradient per dimension: %v, want some in dimensions 0 and 1", moved)
	}
}

// TestFreeBitsTotalAgreesWithSchedule: with a prior that has no
// closed-form KL the trainer floors the total KL at Lambda*D, one group;
// schedule.FreeBits.Objective with that floor and the one total must give
// the graph's KL term.
func TestFreeBitsTotalAgreesWithSchedule(t *testing.T) {
	m := mixtureMLP(t, 2)
	data := binaryRows(4, 12, 5)
	rng := rand.New(rand.NewPCG(6, 6))
	eps := make([]float64, 4*m.Latent())
	for i := range eps {
		eps[i] = rng.NormFloat64()
	}
	p, err := m.build(programKey{kind: kindTrain, batch: 4, k: 1, freeBits: true})
	if err != nil {
		t.Fatal(err)
	}
	if p.klDimAvg != nil {
		t.Fatal("a mixture prior has no per-dimension KL; the trainer must floor the total")
	}
	seenBelow, seenAbove := false, false
	for _, perDim := range []float64{0.01, 0.5, 5} {
		total := perDim * float64(m.Latent())
		r := runTrainProgram(t, m, p, data, eps, 1, total)
		kl := p.scalarValue(p.klAvg)
		obj, clamped, err := schedule.FreeBits{Lambda: total}.Objective([]float64{kl})
		if err != nil {
			t.Fatal(err)
		}
		if !relClose(obj, r.klTerm, 1e-14) {
			t.Errorf("floor %v: schedule.FreeBits.Objective %.17g, graph KL term %.17g (KL %v)", total, obj, r.klTerm, kl)
		}
		seenBelow = seenBelow || clamped[0]
		seenAbove = seenAbove || !clamped[0]
	}
	if !seenBelow || !seenAbove {
		t.Errorf("fixture: the floors did not fall on both sides of the KL (below %v, above %v)", seenBelow, seenAbove)
	}
}

// TestCapacityAgreesWithSchedule: the penalty the trainer adds each step
// is schedule.Capacity.Penalty of that step's KL (the host-side form of
// Burgess et al. 2018, section 5), so Loss = Reconstruction + beta*KL +
// Penalty(KL, step).
func TestCapacityAgreesWithSchedule(t *testing.T) {
	capacity := schedule.Capacity{Gamma: 4, Max: 3, Steps: 4}
	m := smallMLP(t, 3)
	var seen []StepInfo
	if _, err := m.Train(context.Background(), binarySet(t, 6, 12, 2), TrainConfig{Epochs: 2, BatchSize: 2, Seed: 4,
		Beta: schedule.Constant{Value: 0.25}, Capacity: capacity, OnStep: func(s StepInfo) { seen = append(seen, s) }}); err != nil {
		t.Fatal(err)
	}
	if len(seen) != 6 {
		t.Fatalf("%d steps, want 6", len(seen))
	}
	for _, s := range seen {
		if want := s.Reconstruction + 0.25*s.KL + capacity.Penalty(s.KL, s.Step); !relClose(s.Loss, want, 1e-12) {
			t.Errorf("step %d: Loss %.17g, Reconstruction + beta*KL + schedule.Capacity.Penalty %.17g", s.Step, s.Loss, want)
		}
	}
}
