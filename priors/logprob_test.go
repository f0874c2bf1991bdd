package priors

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/floats"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

func TestStandardNormalLogProb(t *testing.T) {
	const n, d = 5, 3
	p, err := NewStandardNormal(d, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	z := randVals(1, n*d, 1.5, 0)
	got := runLogProb(t, p, tensor.Float64, z, n)
	ref := gonumNormal(t, make([]float64, d), make([]float64, d))
	for i := 0; i < n; i++ {
		want := ref.LogProb(z[i*d : (i+1)*d]) // reference: gonum stat/distmv Normal.LogProb
		if !closeRel(got[i], want, 1e-12) {
			t.Errorf("row %d: log p = %.15g, want %.15g", i, got[i], want)
		}
	}
}

func TestDiagonalLogProb(t *testing.T) {
	const n, d = 4, 3
	p, err := NewDiagonal("prior", d, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	mean := []float64{0.3, -1.2, 2}
	lv := []float64{-0.5, 0.7, 1.1}
	setParam(t, p.Params()[0], mean)
	setParam(t, p.Params()[1], lv)
	z := randVals(2, n*d, 2, 0.5)
	got := runLogProb(t, p, tensor.Float64, z, n)
	ref := gonumNormal(t, mean, lv)
	for i := 0; i < n; i++ {
		want := ref.LogProb(z[i*d : (i+1)*d]) // reference: gonum stat/distmv Normal.LogProb
		if !closeRel(got[i], want, 1e-12) {
			t.Errorf("row %d: log p = %.15g, want %.15g", i, got[i], want)
		}
	}
}

// mixtureSetup are the fixed mixture parameters of several tests: three
// components in two dimensions with unequal weights, means and scales.
var (
	mixLogits  = []float64{0.4, -1.0, 0.9}
	mixMeans   = []float64{-2, 1, 0.5, -0.5, 3, 2}
	mixLogVars = []float64{-1, 0.2, 0.5, -0.3, 0, -0.8}
)

func newTestMixture(t *testing.T, dt tensor.Dtype) *Mixture {
	t.Helper()
	p, err := NewMixture("mix", 3, 2, MixtureOptions{Dtype: dt, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	ps := p.Params()
	setParam(t, ps[0], mixLogits)
	setParam(t, ps[1], mixMeans)
	setParam(t, ps[2], mixLogVars)
	return p
}

// mixtureReference is log sum_k exp(log w_k + log N(z; mu_k, s_k)) with the
// component densities from gonum stat/distmv Normal.LogProb and the sum
// from gonum floats.LogSumExp.
func mixtureReference(t *testing.T, logW, mu, lv, z []float64, d int) []float64 {
	t.Helper()
	k := len(logW)
	n := len(z) / d
	out := make([]float64, n)
	terms := make([]float64, k)
	for i := 0; i < n; i++ {
		for c := 0; c < k; c++ {
			ref := gonumNormal(t, mu[c*d:(c+1)*d], lv[c*d:(c+1)*d])
			terms[c] = logW[c] + ref.LogProb(z[i*d:(i+1)*d]) // reference: gonum stat/distmv Normal.LogProb
		}
		out[i] = floats.LogSumExp(terms) // reference: gonum floats.LogSumExp
	}
	return out
}

func TestMixtureComponentsLogProb(t *testing.T) {
	// Each component alone, as a one-component mixture, must be the
	// diagonal Gaussian gonum computes.
	const n, d = 6, 2
	z := randVals(3, n*d, 2, 0)
	for c := 0; c < 3; c++ {
		p, err := NewMixture("one", 1, d, MixtureOptions{Dtype: tensor.Float64})
		if err != nil {
			t.Fatal(err)
		}
		setParam(t, p.Params()[0], []float64{0.7}) // any logit: one weight is 1
		setParam(t, p.Params()[1], mixMeans[c*d:(c+1)*d])
		setParam(t, p.Params()[2], mixLogVars[c*d:(c+1)*d])
		got := runLogProb(t, p, tensor.Float64, z, n)
		ref := gonumNormal(t, mixMeans[c*d:(c+1)*d], mixLogVars[c*d:(c+1)*d])
		for i := 0; i < n; i++ {
			want := ref.LogProb(z[i*d : (i+1)*d]) // reference: gonum stat/distmv Normal.LogProb
			if !closeRel(got[i], want, 1e-11) {
				t.Errorf("component %d row %d: log p = %.15g, want %.15g", c, i, got[i], want)
			}
		}
	}
}

func TestMixtureLogProb(t *testing.T) {
	const d = 2
	p := newTestMixture(t, tensor.Float64)
	z := randVals(4, 5*d, 2, 0)
	// A far row: every component density is below exp(-745), so a naive
	// log(sum(exp)) underflows to -Inf; the stable form must stay finite.
	z = append(z, 40, -38)
	n := len(z) / d
	got := runLogProb(t, p, tensor.Float64, z, n)
	logW := make([]float64, len(mixLogits))
	lse := floats.LogSumExp(mixLogits) // reference: gonum floats.LogSumExp
	for k, l := range mixLogits {
		logW[k] = l - lse
	}
	want := mixtureReference(t, logW, mixMeans, mixLogVars, z, d)
	for i := range want {
		if math.IsInf(got[i], 0) || math.IsNaN(got[i]) || !closeRel(got[i], want[i], 1e-10) {
			t.Errorf("row %d: log p = %.15g, want %.15g", i, got[i], want[i])
		}
	}
}

func TestMixtureFloat32(t *testing.T) {
	const d = 2
	p := newTestMixture(t, tensor.Float32)
	z := randVals(6, 8*d, 1.5, 0)
	got := runLogProb(t, p, tensor.Float32, z, 8)
	logW := make([]float64, len(mixLogits))
	lse := floats.LogSumExp(mixLogits) // reference: gonum floats.LogSumExp
	for k, l := range mixLogits {
		logW[k] = l - lse
	}
	want := mixtureReference(t, logW, mixMeans, mixLogVars, z, d)
	for i := range want {
		// float32 has about 7 significant digits; the expansion adds a few
		// roundings of numbers of size |z|^2/s, so 1e-4 relative is enough.
		if !closeRel(got[i], want[i], 1e-4) {
			t.Errorf("row %d: float32 log p = %.7g, want %.7g", i, got[i], want[i])
		}
	}
	x, err := p.Sample(newRNG(1), 3)
	if err != nil {
		t.Fatal(err)
	}
	if x.Dtype() != tensor.Float32 {
		t.Errorf("float32 mixture samples have dtype %v", x.Dtype())
	}
}

// newTestVamp builds a VampPrior with K = 3 pseudo-inputs of width 3 and
// a small tanh MLP encoder with a Gaussian head of latent size 2.
func newTestVamp(t *testing.T, dt tensor.Dtype) (*Vamp, layers.Layer, *layers.GaussianHead) {
	t.Helper()
	opt := layers.Options{Dtype: dt, Seed: 11}
	enc, err := layers.NewMLP("enc", layers.MLPConfig{Sizes: []int{3, 4}, Output: layers.Tanh}, opt)
	if err != nil {
		t.Fatal(err)
	}
	head, err := layers.NewGaussianHead("head", 4, 2, opt)
	if err != nil {
		t.Fatal(err)
	}
	p, err := NewVamp("vamp", 3, []int{3}, enc, head, VampOptions{Dtype: dt, Seed: 3})
	if err != nil {
		t.Fatal(err)
	}
	// Spread the pseudo-inputs out so the components differ clearly.
	setParam(t, p.Params()[0], randVals(8, 9, 1.5, 0))
	return p, enc, head
}

// encodePseudo runs encoder and head on the flat (K, F) pseudo-inputs in a
// graph built here and returns mu and logVar. It is for flat inputs only:
// image-shaped pseudo-inputs are checked against a reference without any
// graph (vampRef in vamp_image_test.go).
func encodePseudo(t *testing.T, p *Vamp, enc layers.Layer, head *layers.GaussianHead, inputShape []int) (mu, lv []float64) {
	t.Helper()
	if len(inputShape) != 1 {
		t.Fatalf("encodePseudo: input shape %v is not flat", inputShape)
	}
	g := G.NewGraph()
	s := layers.NewScope(g)
	u := s.Bind(p.Params()[0])
	h, err := enc.Forward(s, u)
	if err != nil {
		t.Fatal(err)
	}
	muN, lvN, err := head.Forward(s, h)
	if err != nil {
		t.Fatal(err)
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		t.Fatal(err)
	}
	return mustValues(t, muN.Value().(*tensor.Dense)), mustValues(t, lvN.Value().(*tensor.Dense))
}

func TestVampLogProb(t *testing.T) {
	const d = 2
	p, enc, head := newTestVamp(t, tensor.Float64)
	mu, lv := encodePseudo(t, p, enc, head, []int{3})
	z := randVals(9, 6*d, 1, 0)
	got := runLogProb(t, p, tensor.Float64, z, 6)
	logW := []float64{-math.Log(3), -math.Log(3), -math.Log(3)}
	want := mixtureReference(t, logW, mu, lv, z, d)
	for i := range want {
		if !closeRel(got[i], want[i], 1e-10) {
			t.Errorf("row %d: log p = %.15g, want %.15g", i, got[i], want[i])
		}
	}
}

// flatDense is a test encoder for (N, C, H, W) batches: it flattens each
// record and applies a Dense layer, like the input end of a conv encoder.
type flatDense struct{ d *layers.Dense }

func (f flatDense) Forward(s *layers.Scope, x *G.Node) (*G.Node, error) {
	sh := x.Shape()
	flat, err := G.Reshape(x, tensor.Shape{sh[0], sh.TotalSize() / sh[0]})
	if err != nil {
		return nil, err
	}
	return f.d.Forward(s, flat)
}

func (f flatDense) Params() []*layers.Param { return f.d.Params() }

func TestVampImageShape(t *testing.T) {
	const d = 2
	opt := layers.Options{Dtype: tensor.Float64, Seed: 2}
	dense, err := layers.NewDense("enc", 6, 3, opt)
	if err != nil {
		t.Fatal(err)
	}
	head, err := layers.NewGaussianHead("head", 3, d, opt)
	if err != nil {
		t.Fatal(err)
	}
	shape := []int{1, 2, 3}
	p, err := NewVamp("vamp", 4, shape, flatDense{dense}, head, VampOptions{Dtype: tensor.Float64, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	if got := p.Params()[0].Value.Shape(); !got.Eq(tensor.Shape{4, 6}) {
		t.Fatalf("pseudo-inputs shape %v, want (4, 6)", got)
	}
	// Reference: the same function of the flat pseudo-inputs with gonum
	// (a Dense map of each flattened record, then the head), no graph.
	w, b := mustValues(t, dense.Weight().Value), mustValues(t, dense.Bias().Value)
	ref := vampImageCase{name: "1x2x3 flatten-dense", shape: shape, width: 3, features: func(x []float64) []float64 {
		return denseRef(x, 1, 6, w, 3, b)
	}}
	setParam(t, p.Params()[0], randVals(35, 4*6, 1, 0))
	z := randVals(10, 3*d, 1, 0)
	got := runLogProb(t, p, tensor.Float64, z, 3)
	want := vampRef(t, ref, head, mustValues(t, p.Params()[0].Value), 4, 6, z, d)
	for i := range want {
		if !closeRel(got[i], want[i], 1e-10) {
			t.Errorf("row %d: log p = %.15g, want %.15g", i, got[i], want[i])
		}
	}
}

func TestVampFloat32(t *testing.T) {
	const d = 2
	p, enc, head := newTestVamp(t, tensor.Float32)
	mu, lv := encodePseudo(t, p, enc, head, []int{3})
	z := randVals(12, 4*d, 1, 0)
	got := runLogProb(t, p, tensor.Float32, z, 4)
	logW := []float64{-math.Log(3), -math.Log(3), -math.Log(3)}
	want := mixtureReference(t, logW, mu, lv, z, d)
	for i := range want {
		// float32 arithmetic: 1e-4 relative, as in TestMixtureFloat32.
		if !closeRel(got[i], want[i], 1e-4) {
			t.Errorf("row %d: float32 log p = %.7g, want %.7g", i, got[i], want[i])
		}
	}
	x, err := p.Sample(newRNG(2), 5)
	if err != nil {
		t.Fatal(err)
	}
	if x.Dtype() != tensor.Float32 || !x.Shape().Eq(tensor.Shape{5, d}) {
		t.Errorf("float32 Vamp samples: dtype %v shape %v", x.Dtype(), x.Shape())
	}
}

func TestVampInitFromData(t *testing.T) {
	data := make([]float64, 10*3)
	for i := range data {
		data[i] = float64(i) // row r holds 3r, 3r+1, 3r+2
	}
	opt := layers.Options{Dtype: tensor.Float64}
	enc, err := layers.NewDense("enc", 3, 2, opt)
	if err != nil {
		t.Fatal(err)
	}
	head, err := layers.NewGaussianHead("head", 2, 2, opt)
	if err != nil {
		t.Fatal(err)
	}
	p, err := NewVamp("vamp", 4, []int{3}, enc, head, VampOptions{Seed: 9, Data: denseOf(tensor.Float64, data, 10, 3)})
	if err != nil {
		t.Fatal(err)
	}
	if p.Dtype() != tensor.Float64 {
		t.Errorf("dtype %v, want float64 taken from the head", p.Dtype())
	}
	u := mustValues(t, p.Params()[0].Value)
	seen := map[float64]bool{}
	for k := 0; k < 4; k++ {
		row := u[k*3 : (k+1)*3]
		// Each pseudo-input must be one whole data row, and all distinct.
		if math.Mod(row[0], 3) != 0 || row[1] != row[0]+1 || row[2] != row[0]+2 || seen[row[0]] {
			t.Errorf("pseudo-input %d = %v is not a distinct data row", k, row)
		}
		seen[row[0]] = true
	}
}
