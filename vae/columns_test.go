package vae_test

import (
	"bytes"
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distmv"
	"gonum.org/v1/gonum/stat/distuv"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/dataset"
)

// setParam copies v into a float64 parameter.
func setParam(t *testing.T, p *layers.Param, v []float64) {
	t.Helper()
	d := p.Value.Data().([]float64)
	if len(d) != len(v) {
		t.Fatalf("%s: %d values, want %d", p.Name, len(v), len(d))
	}
	copy(d, v)
}

// missingPPCA is probabilistic PCA (Tipping and Bishop 1999) with one
// latent dimension, z ~ N(0, 1), x | z ~ N(w z + b, s2 I), observed on the
// coordinates obs only. Its marginal on the observed coordinates is
// N(b_o, w_o w_o^T + s2 I) and the posterior p(z | x_o) is
// N(w_o.(x_o - b_o)/M, s2/M), M = w_o.w_o + s2 (Tipping and Bishop 1999,
// section 3.2, applied to the observed rows of W).
type missingPPCA struct {
	f   int
	s2  float64
	w   []float64
	b   []float64
	obs []int // observed coordinates, the same for every record
	mis []int
	x   []float64 // N x F with NaN at the missing coordinates
	n   int
}

func newMissingPPCA(n int) *missingPPCA {
	rng := rand.New(rand.NewPCG(140, 141))
	p := &missingPPCA{f: 5, s2: 0.4, w: []float64{1.5, -0.7, 1.1, 0.4, -1.2}, b: []float64{0.3, -1, 0.5, 2, 0}, obs: []int{0, 2, 3}, mis: []int{1, 4}, n: n}
	for r := 0; r < n; r++ {
		z := rng.NormFloat64()
		for i := 0; i < p.f; i++ {
			p.x = append(p.x, p.b[i]+p.w[i]*z+math.Sqrt(p.s2)*rng.NormFloat64())
		}
		for _, i := range p.mis {
			p.x[r*p.f+i] = math.NaN()
		}
	}
	return p
}

// posterior returns the exact posterior mean of z given the observed part
// of record r, and the (common) posterior variance.
func (p *missingPPCA) posterior(r int) (mean, variance float64) {
	m := p.s2
	dot := 0.0
	for _, i := range p.obs {
		m += p.w[i] * p.w[i]
		dot += p.w[i] * (p.x[r*p.f+i] - p.b[i])
	}
	return dot / m, p.s2 / m
}

// model returns a columns model whose decoder is the PPCA's linear map and
// whose encoder outputs q(z|x_o) = N(a*mean + shift, scale*variance) with
// the exact posterior (mean, variance): a linear function of the
// zero-filled record, which the fixed missing pattern allows.
func (p *missingPPCA) model(t *testing.T, shift, scale float64) *vae.Model {
	t.Helper()
	opt := layers.Options{Dtype: tensor.Float64}
	cols := make([]losses.Column, p.f)
	for i := range cols {
		cols[i] = losses.Column{Kind: losses.ColumnReal, Sigma: math.Sqrt(p.s2)}
	}
	lik, err := losses.NewColumns("lik", cols, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	enc, err := layers.NewDense("enc", lik.EncoderWidth(), 1, opt)
	if err != nil {
		t.Fatal(err)
	}
	m := p.s2
	for _, i := range p.obs {
		m += p.w[i] * p.w[i]
	}
	// enc(x) = w_o.(x_o - b_o)/M: weight w_i/M on observed x_i, 0 on the
	// missing coordinates and on the mask; bias -w_o.b_o/M.
	wEnc := make([]float64, lik.EncoderWidth())
	bias := 0.0
	for _, i := range p.obs {
		wEnc[i] = p.w[i] / m
		bias -= p.w[i] * p.b[i] / m
	}
	setParam(t, enc.Weight(), wEnc)
	setParam(t, enc.Bias(), []float64{bias})
	head, err := layers.NewGaussianHead("head", 1, 1, opt)
	if err != nil {
		t.Fatal(err)
	}
	hp := head.Params() // mean.weight, mean.bias, logvar.weight, logvar.bias
	setParam(t, hp[0], []float64{1})
	setParam(t, hp[1], []float64{shift})
	setParam(t, hp[2], []float64{0})
	setParam(t, hp[3], []float64{math.Log(scale * p.s2 / m)})
	dec, err := layers.NewDense("dec", 1, p.f, opt)
	if err != nil {
		t.Fatal(err)
	}
	setParam(t, dec.Weight(), p.w)
	setParam(t, dec.Bias(), p.b)
	model, err := vae.New(vae.Config{InputShape: []int{p.f}, Encoder: enc, Head: head, Decoder: dec, Likelihood: lik, Dtype: tensor.Float64})
	if err != nil {
		t.Fatal(err)
	}
	return model
}

// exactLogPx is log p(x_o) of record r: the Gaussian marginal on the
// observed coordinates, N(b_o, w_o w_o^T + s2 I), from gonum distmv.
func (p *missingPPCA) exactLogPx(t *testing.T, r int) float64 {
	k := len(p.obs)
	cov := mat.NewSymDense(k, nil)
	mu := make([]float64, k)
	xo := make([]float64, k)
	for a, i := range p.obs {
		mu[a], xo[a] = p.b[i], p.x[r*p.f+i]
		for c, j := range p.obs {
			v := p.w[i] * p.w[j]
			if a == c {
				v += p.s2
			}
			cov.SetSym(a, c, v)
		}
	}
	nrm, ok := distmv.NewNormal(mu, cov, nil)
	if !ok {
		t.Fatal("covariance not positive definite")
	}
	return nrm.LogProb(xo)
}

// With the exact posterior as q, every importance weight equals p(x_o), so
// the importance-weighted score is exactly -log p(x_o), the Gaussian
// marginal on the observed coordinates (gonum distmv).
func TestColumnsPPCAMissingExact(t *testing.T) {
	p := newMissingPPCA(6)
	m := p.model(t, 0, 1)
	data, err := dataset.NewMissing(p.x, p.n, p.f)
	if err != nil {
		t.Fatal(err)
	}
	scores, err := m.Score(context.Background(), data, vae.ScoreOptions{K: 4, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	for r, s := range scores {
		if want := -p.exactLogPx(t, r); math.Abs(s-want) > 1e-9*math.Max(1, math.Abs(want)) {
			t.Errorf("record %d: score %.12g, want -log p(x_o) = %.12g", r, s, want)
		}
	}
	// Evaluate's importance-weighted NLL is the mean of the same values
	// (the mean over records of -log p(x_o), observed entries only).
	rep, err := m.Evaluate(context.Background(), data, vae.EvalOptions{K: 4, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	meanNLL := 0.0
	for r := 0; r < p.n; r++ {
		meanNLL -= p.exactLogPx(t, r) / float64(p.n)
	}
	if math.Abs(rep.NLL-meanNLL) > 1e-9*math.Abs(meanNLL) {
		t.Errorf("Evaluate NLL %.12g, want the mean -log p(x_o) %.12g", rep.NLL, meanNLL)
	}
	// Imputation against the Gaussian conditional mean
	// mu_m + S_mo S_oo^-1 (x_o - mu_o), S = w w^T + s2 I (Bishop 2006,
	// PRML section 2.3.1), computed with gonum mat.
	imp, err := m.Impute(context.Background(), data)
	if err != nil {
		t.Fatal(err)
	}
	k := len(p.obs)
	s := func(i, j int) float64 {
		v := p.w[i] * p.w[j]
		if i == j {
			v += p.s2
		}
		return v
	}
	soo := mat.NewDense(k, k, nil)
	smo := mat.NewDense(len(p.mis), k, nil)
	for a, i := range p.obs {
		for c, j := range p.obs {
			soo.Set(a, c, s(i, j))
		}
		for c, j := range p.mis {
			smo.Set(c, a, s(j, i))
		}
	}
	for r := 0; r < p.n; r++ {
		d := mat.NewVecDense(k, nil)
		for a, i := range p.obs {
			d.SetVec(a, p.x[r*p.f+i]-p.b[i])
		}
		var sol, cm mat.VecDense
		if err := sol.SolveVec(soo, d); err != nil {
			t.Fatal(err)
		}
		cm.MulVec(smo, &sol)
		for c, j := range p.mis {
			want := p.b[j] + cm.AtVec(c)
			if got := imp.At(r, j); math.Abs(got-want) > 1e-9 {
				t.Errorf("record %d, missing %d: imputed %.12g, want conditional mean %.12g", r, j, got, want)
			}
		}
		for _, i := range p.obs {
			if imp.At(r, i) != p.x[r*p.f+i] {
				t.Errorf("record %d: observed %d changed", r, i)
			}
		}
	}
}

// With a wrong q (mean shifted, variance doubled) the masked ELBO lies
// below log p(x_o) and the importance-weighted estimate approaches it. The
// expected masked ELBO has a closed form here (Gaussian expectations):
//
//	E_q log p(x_o|z) = sum_o [log N(x_i; w_i m + b_i, s2) - w_i^2 v / (2 s2)]
//	KL = 0.5 (v + m^2 - 1 - log v)       (Kingma and Welling 2014, app. B)
func TestColumnsPPCAMissingBounds(t *testing.T) {
	const n = 200
	p := newMissingPPCA(n)
	const shift, scale = 0.6, 2.0
	m := p.model(t, shift, scale)
	data, err := dataset.NewMissing(p.x, p.n, p.f)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	elboScores, err := m.Score(ctx, data, vae.ScoreOptions{K: 1, Seed: 3})
	if err != nil {
		t.Fatal(err)
	}
	iwScores, err := m.Score(ctx, data, vae.ScoreOptions{K: 2000, Seed: 4})
	if err != nil {
		t.Fatal(err)
	}
	var exact, elboClosed, elboMC, iw float64
	for r := 0; r < n; r++ {
		exact += p.exactLogPx(t, r) / n
		pm, pv := p.posterior(r)
		qm, qv := pm+shift, pv*scale
		rec := 0.0
		for _, i := range p.obs {
			rec += distuv.Normal{Mu: p.w[i]*qm + p.b[i], Sigma: math.Sqrt(p.s2)}.LogProb(p.x[r*p.f+i]) - p.w[i]*p.w[i]*qv/(2*p.s2)
		}
		elboClosed += (rec - 0.5*(qv+qm*qm-1-math.Log(qv))) / n
		elboMC += -elboScores[r] / n
		iw += -iwScores[r] / n
	}
	t.Logf("mean over %d records: log p(x_o) %.4f, ELBO closed form %.4f, one-sample ELBO %.4f, IW(K=2000) %.4f", n, exact, elboClosed, elboMC, iw)
	if !(elboClosed < exact-0.05) {
		t.Errorf("closed-form ELBO %v not below log p(x_o) %v", elboClosed, exact)
	}
	// One sample per record: the mean of 200 has standard error about
	// 0.05 here; 0.2 is four of them.
	if math.Abs(elboMC-elboClosed) > 0.2 {
		t.Errorf("one-sample masked ELBO %v, closed form %v", elboMC, elboClosed)
	}
	if !(iw <= exact+0.01) || exact-iw > 0.02 || exact-iw > (exact-elboClosed)/5 {
		t.Errorf("IW(2000) %v does not approach log p(x_o) %v (ELBO %v)", iw, exact, elboClosed)
	}
}

// mixedSchema is a dataset schema with one column of every kind.
var mixedSchema = dataset.Schema{Columns: []dataset.SchemaColumn{
	{Name: "temp", Kind: dataset.KindReal},
	{Name: "flow", Kind: dataset.KindPositive},
	{Name: "starts", Kind: dataset.KindCount},
	{Name: "open", Kind: dataset.KindBinary},
	{Name: "mode", Kind: dataset.KindCategorical, Categories: []string{"idle", "run", "purge"}},
}}

func mixedSet(t *testing.T, n int, missing float64, seed uint64) *dataset.Set {
	t.Helper()
	rng := rand.New(rand.NewPCG(seed, 1))
	x := make([]float64, 0, n*5)
	for i := 0; i < n; i++ {
		mode := rng.IntN(3)
		z := rng.NormFloat64() + float64(mode)
		row := []float64{z + 0.3*rng.NormFloat64(), math.Exp(0.5*z + 0.2*rng.NormFloat64()), float64(rng.IntN(3) + mode), float64(b2i(z > 1)), float64(mode)}
		for j := range row {
			if rng.Float64() < missing {
				row[j] = math.NaN()
			}
		}
		x = append(x, row...)
	}
	s, err := dataset.NewMissing(x, n, 5)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func b2i(b bool) int {
	if b {
		return 1
	}
	return 0
}

func TestColumnsModelEndToEnd(t *testing.T) {
	cols, err := vae.ColumnsFromSchema(mixedSchema, true)
	if err != nil {
		t.Fatal(err)
	}
	lik, err := losses.NewColumns("lik", cols, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: 5, Hidden: []int{16}, Latent: 2, Likelihood: lik, Dtype: tensor.Float64, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	train := mixedSet(t, 200, 0.2, 7)
	ctx := context.Background()
	if _, err := m.Train(ctx, train, vae.TrainConfig{Epochs: 3, BatchSize: 50, LearnRate: 3e-3, Seed: 1}); err != nil {
		t.Fatal(err)
	}
	test := mixedSet(t, 20, 0.3, 8)
	scores, contrib, err := m.ScoreColumns(ctx, test, vae.ScoreOptions{K: 1, Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	plain, err := m.Score(ctx, test, vae.ScoreOptions{K: 1, Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	// Same noise, same score; the row of contributions is the
	// reconstruction term, so score - row sum is the KL, >= 0; a missing
	// entry contributes 0.
	for i, s := range scores {
		if math.Abs(s-plain[i]) > 1e-9*math.Max(1, math.Abs(s)) {
			t.Errorf("record %d: ScoreColumns %v, Score %v", i, s, plain[i])
		}
		if kl := s - mat.Sum(contrib.RowView(i)); kl < -1e-9 {
			t.Errorf("record %d: score %v below its reconstruction term (KL %v)", i, s, kl)
		}
		for j := 0; j < 5; j++ {
			if !test.Observed(i, j) && contrib.At(i, j) != 0 {
				t.Errorf("record %d: missing column %d contributes %v", i, j, contrib.At(i, j))
			}
		}
	}
	// Imputation keeps observed entries and puts a category index in the
	// categorical column; draws are repeatable.
	imp, err := m.Impute(ctx, test)
	if err != nil {
		t.Fatal(err)
	}
	d1, err := m.ImputeDraws(ctx, test, 2, 9)
	if err != nil {
		t.Fatal(err)
	}
	d2, _ := m.ImputeDraws(ctx, test, 2, 9)
	for i := 0; i < test.Len(); i++ {
		for j, v := range test.Row(i) {
			if !math.IsNaN(v) && (imp.At(i, j) != v || d1[0].At(i, j) != v) {
				t.Errorf("record %d column %d: observed %v changed", i, j, v)
			}
		}
		if c := imp.At(i, 4); c != math.Floor(c) || c < 0 || c > 2 {
			t.Errorf("record %d: imputed category %v", i, c)
		}
		if !mat.Equal(d1[1].RowView(i), d2[1].RowView(i)) {
			t.Errorf("record %d: draws differ between calls with one seed", i)
		}
	}
	// Save and Load: the columns likelihood, schema and standardizer
	// come back; scores are identical.
	if err := m.SetSchema(mixedSchema); err != nil {
		t.Fatal(err)
	}
	var buf bytes.Buffer
	if err := m.SaveTo(&buf); err != nil {
		t.Fatal(err)
	}
	back, err := vae.LoadFrom(&buf)
	if err != nil {
		t.Fatal(err)
	}
	sc, ok, err := back.Schema()
	if err != nil || !ok || len(sc.Columns) != 5 || sc.Columns[4].Categories[2] != "purge" {
		t.Errorf("Schema after Load: %+v %v %v", sc, ok, err)
	}
	again, _, err := back.ScoreColumns(ctx, test, vae.ScoreOptions{K: 1, Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	for i := range again {
		if again[i] != scores[i] {
			t.Errorf("record %d: score %v after Load, %v before", i, again[i], scores[i])
		}
	}
	// A bad value names record and column.
	bad, _ := dataset.NewMissing([]float64{0, 1, 1, 1, 5}, 1, 5)
	if _, err := m.Score(ctx, bad, vae.ScoreOptions{}); !errors.Is(err, dataset.ErrInvalidData) {
		t.Errorf("category 5 of 3: err = %v", err)
	}
	// A model without a columns likelihood refuses.
	plainModel, _ := vae.NewMLP(vae.MLPConfig{Input: 5, Hidden: []int{4}, Latent: 1, Dtype: tensor.Float64})
	if _, _, err := plainModel.ScoreColumns(ctx, test, vae.ScoreOptions{}); !errors.Is(err, vae.ErrNotColumns) {
		t.Errorf("ScoreColumns on a Bernoulli model: err = %v", err)
	}
}

// A ragged last batch is padded with rows that must not count: for a
// positive column a zero padding value is outside the support (log-prob
// -Inf) and -Inf times a zero weight is NaN. Padding rows are all missing.
func TestColumnsRaggedBatchPositive(t *testing.T) {
	lik, err := losses.NewColumns("lik", []losses.Column{{Kind: losses.ColumnPositive}, {Kind: losses.ColumnCount}}, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: 2, Hidden: []int{4}, Latent: 1, Likelihood: lik, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	x := make([]float64, 0, 2*13)
	for i := 0; i < 13; i++ {
		x = append(x, 1+float64(i)/10, float64(i%3))
	}
	data, err := dataset.New(x, 13, 2)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := m.Train(context.Background(), data, vae.TrainConfig{Epochs: 1, BatchSize: 8, Seed: 1}); err != nil {
		t.Fatalf("13 records in batches of 8: %v", err)
	}
}

// Multiple imputations from the exact posterior are draws from the
// Gaussian conditional p(x_m | x_o): mean mu_m + S_mo S_oo^-1 (x_o - mu_o)
// and covariance S_mm - S_mo S_oo^-1 S_om (Bishop 2006, PRML section
// 2.3.1), computed here with gonum mat. One record repeated 3000 times
// (each copy has its own noise), two draws each.
func TestColumnsPPCAImputeDraws(t *testing.T) {
	p := newMissingPPCA(1)
	m := p.model(t, 0, 1)
	const copies = 3000
	x := make([]float64, 0, copies*p.f)
	for i := 0; i < copies; i++ {
		x = append(x, p.x[:p.f]...)
	}
	data, err := dataset.NewMissing(x, copies, p.f)
	if err != nil {
		t.Fatal(err)
	}
	draws, err := m.ImputeDraws(context.Background(), data, 2, 11)
	if err != nil {
		t.Fatal(err)
	}
	s := func(i, j int) float64 {
		v := p.w[i] * p.w[j]
		if i == j {
			v += p.s2
		}
		return v
	}
	k := len(p.obs)
	soo := mat.NewDense(k, k, nil)
	smo := mat.NewDense(len(p.mis), k, nil)
	d := mat.NewVecDense(k, nil)
	for a, i := range p.obs {
		d.SetVec(a, p.x[i]-p.b[i])
		for c, j := range p.obs {
			soo.Set(a, c, s(i, j))
		}
		for c, j := range p.mis {
			smo.Set(c, a, s(j, i))
		}
	}
	var sol mat.VecDense
	if err := sol.SolveVec(soo, d); err != nil {
		t.Fatal(err)
	}
	var cm mat.VecDense
	cm.MulVec(smo, &sol)
	var tmp, reduce mat.Dense
	if err := tmp.Solve(soo, smo.T()); err != nil {
		t.Fatal(err)
	}
	reduce.Mul(smo, &tmp)
	for c, j := range p.mis {
		wantMean := p.b[j] + cm.AtVec(c)
		wantVar := s(j, j) - reduce.At(c, c)
		sum, sq, n := 0.0, 0.0, 0.0
		for _, dr := range draws {
			for i := 0; i < copies; i++ {
				v := dr.At(i, j)
				sum += v
				sq += v * v
				n++
			}
		}
		mean := sum / n
		variance := sq/n - mean*mean
		// 6000 draws: standard error sqrt(var/n) of the mean and about
		// var*sqrt(2/n) of the variance; 5 of them as tolerance.
		if se := math.Sqrt(wantVar / n); math.Abs(mean-wantMean) > 5*se {
			t.Errorf("missing %d: draw mean %v, want %v (se %v)", j, mean, wantMean, se)
		}
		if se := wantVar * math.Sqrt(2/n); math.Abs(variance-wantVar) > 5*se {
			t.Errorf("missing %d: draw variance %v, want %v (se %v)", j, variance, wantVar, se)
		}
	}
}
