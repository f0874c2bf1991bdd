package losses_test

import (
	"encoding/json"
	"errors"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

var _ losses.Likelihood = (*losses.Columns)(nil)

// mixedSchema has one column of every kind, sigma fixed and learned.
var mixedSchema = []losses.Column{
	{Name: "temp", Kind: losses.ColumnReal, Sigma: 0.5},
	{Name: "press", Kind: losses.ColumnReal, LearnSigma: true},
	{Name: "flow", Kind: losses.ColumnPositive, Sigma: 0.8},
	{Name: "rate", Kind: losses.ColumnPositive, LearnSigma: true},
	{Name: "starts", Kind: losses.ColumnCount},
	{Name: "alarm", Kind: losses.ColumnBinary},
	{Name: "mode", Kind: losses.ColumnCategorical, Categories: 3},
}

// mixedData returns n records for mixedSchema (with NaN where missing is
// set), decoder outputs and raw log sigma parameters.
func mixedData(rng *rand.Rand, n int, missing bool) (x, out, ls []float64) {
	c := len(mixedSchema)
	x = make([]float64, n*c)
	out = randn(rng, n*9, 1)
	for i := 0; i < n; i++ {
		r := x[i*c : (i+1)*c]
		r[0] = rng.NormFloat64()
		r[1] = 2 * rng.NormFloat64()
		r[2] = math.Exp(rng.NormFloat64())
		r[3] = 0.1 + 3*rng.Float64()
		r[4] = float64(rng.IntN(6))
		r[5] = float64(rng.IntN(2))
		r[6] = float64(rng.IntN(3))
		if missing {
			r[(i*3)%c] = math.NaN()
		}
	}
	ls = uniform(rng, c, -0.7, 0.7)
	return x, out, ls
}

// refColumn is log p(x_j | out) for column j of mixedSchema from gonum
// stat/distuv (Normal, LogNormal, Poisson, Bernoulli, Categorical), with the
// effective log sigma logS; 0 for a missing entry.
func refColumn(j int, xv float64, row []float64, logS float64) float64 {
	offs := []int{0, 1, 2, 3, 4, 5, 6}
	if math.IsNaN(xv) {
		return 0
	}
	o := row[offs[j]]
	switch j {
	case 0:
		return distuv.Normal{Mu: o, Sigma: 0.5}.LogProb(xv)
	case 1:
		return distuv.Normal{Mu: o, Sigma: math.Exp(logS)}.LogProb(xv)
	case 2:
		return distuv.LogNormal{Mu: o, Sigma: 0.8}.LogProb(xv)
	case 3:
		return distuv.LogNormal{Mu: o, Sigma: math.Exp(logS)}.LogProb(xv)
	case 4:
		return distuv.Poisson{Lambda: math.Exp(o)}.LogProb(xv)
	case 5:
		return distuv.Bernoulli{P: sigmoid(o)}.LogProb(xv)
	case 6:
		return categorical(row[6:9]).LogProb(xv)
	}
	panic("column")
}

// categorical returns gonum's categorical distribution with weights
// exp(logits) (distuv normalises the weights).
func categorical(logits []float64) distuv.Categorical {
	w := make([]float64, len(logits))
	for k, l := range logits {
		w[k] = math.Exp(l)
	}
	return distuv.NewCategorical(w, nil)
}

// floorRef is the soft lower bound of the learned log sigma as documented
// on LearnedGaussian: MinLogSigma + softplus(r - MinLogSigma).
func floorRef(r float64) float64 { return losses.MinLogSigma + softplusRef(r-losses.MinLogSigma) }

func TestColumnsMatchGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(110, 111))
	const n = 5
	c := len(mixedSchema)
	x, out, lsParam := mixedData(rng, n, true)
	for _, dt := range dtypes {
		round32(x, out, lsParam)
		lik, err := losses.NewColumns("dec", mixedSchema, dt)
		if err != nil {
			t.Fatal(err)
		}
		if lik.OutputWidth() != 9 {
			t.Fatalf("OutputWidth = %d, want 9 (6 one-output columns + 3 categories)", lik.OutputWidth())
		}
		ps := lik.Params()
		if len(ps) != 1 || ps[0].Name != "dec.log_sigma" || !ps[0].Value.Shape().Eq(tensor.Shape{1, c}) {
			t.Fatalf("Params = %v", ps)
		}
		switch d := ps[0].Value.Data().(type) {
		case []float64:
			copy(d, lsParam)
		case []float32:
			for i := range d {
				d[i] = float32(lsParam[i])
			}
		}
		g := G.NewGraph()
		s := layers.NewScope(g)
		xN := input(g, dt, "x", n, c, x)
		oN := input(g, dt, "out", n, 9, out)
		colLP, err := lik.ColumnLogProb(s, xN, oN)
		if err != nil {
			t.Fatal(err)
		}
		rec, err := lik.LogProb(s, xN, oN)
		if err != nil {
			t.Fatal(err)
		}
		mean, err := lik.Mean(s, oN)
		if err != nil {
			t.Fatal(err)
		}
		cw, rw, mw := watch(colLP), watch(rec), watch(mean)
		run(t, g)
		tol := 1e-12
		if dt == tensor.Float32 {
			tol = 2e-5
		}
		var want, wantRec, wantMean []float64
		for i := 0; i < n; i++ {
			row := out[i*9 : (i+1)*9]
			sum := 0.0
			for j := 0; j < c; j++ {
				v := refColumn(j, x[i*c+j], row, floorRef(lsParam[j]))
				want = append(want, v)
				sum += v
			}
			wantRec = append(wantRec, sum)
			// reference: distuv means; the mode of the categorical is
			// the category of largest distuv probability.
			cat := categorical(row[6:9])
			mode := 0
			for k := 1; k < 3; k++ {
				if cat.Prob(float64(k)) > cat.Prob(float64(mode)) {
					mode = k
				}
			}
			wantMean = append(wantMean, row[0], row[1],
				distuv.LogNormal{Mu: row[2], Sigma: 0.8}.Mean(),
				distuv.LogNormal{Mu: row[3], Sigma: math.Exp(floorRef(lsParam[3]))}.Mean(),
				distuv.Poisson{Lambda: math.Exp(row[4])}.Mean(),
				distuv.Bernoulli{P: sigmoid(row[5])}.Mean(),
				float64(mode))
		}
		checkAll(t, dt.String()+" column log-prob", values(t, cw), want, tol, 1)
		checkAll(t, dt.String()+" record log-prob", values(t, rw), wantRec, tol, 1)
		checkAll(t, dt.String()+" mean", values(t, mw), wantMean, tol, 1)
	}
}

// The gradient with respect to the decoder output and the log sigmas,
// against gonum diff/fd central differences of the distuv log-probability
// (through gradCheckWRT), with missing entries in x.
func TestColumnsLogProbGradient(t *testing.T) {
	rng := rand.New(rand.NewPCG(112, 113))
	const n = 4
	c := len(mixedSchema)
	x, out, ls := mixedData(rng, n, true)
	xT := denseOf(tensor.Float64, []int{n, c}, x)
	args := []arg{{name: "out", rows: n, cols: 9, data: out}, {name: "ls", rows: 1, cols: c, data: ls}}
	gradCheck(t, "ColumnsLogProb", args, func(in []*G.Node) (*G.Node, error) {
		xN := G.NewConstant(xT, G.WithName("x"))
		return losses.ColumnsLogProb(mixedSchema, xN, in[0], in[1])
	}, func(in [][]float64) []float64 {
		o, l := in[0], in[1]
		var r []float64
		for i := 0; i < n; i++ {
			for j := 0; j < c; j++ {
				// fixed-sigma columns ignore the log sigma input
				r = append(r, refColumn(j, x[i*c+j], o[i*9:(i+1)*9], l[j]))
			}
		}
		return r
	})
}

func TestColumnsSpecRoundTrip(t *testing.T) {
	lik, err := losses.NewColumns("dec", mixedSchema, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	spec, ok := losses.DescribeLikelihood(lik)
	want := losses.LikelihoodSpec{Kind: losses.KindColumns, Features: len(mixedSchema), Name: "dec", Columns: mixedSchema}
	if !ok || !reflect.DeepEqual(spec, want) {
		t.Fatalf("DescribeLikelihood = %+v, %v; want %+v", spec, ok, want)
	}
	b, err := json.Marshal(spec)
	if err != nil {
		t.Fatal(err)
	}
	var back losses.LikelihoodSpec
	if err := json.Unmarshal(b, &back); err != nil {
		t.Fatal(err)
	}
	l, err := losses.LikelihoodFromSpec(back, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	again, _ := losses.DescribeLikelihood(l)
	if !reflect.DeepEqual(again, want) {
		t.Errorf("rebuilt describes as %+v, want %+v", again, want)
	}
	bad := back
	bad.Features = 3
	if _, err := losses.LikelihoodFromSpec(bad, tensor.Float32); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("features mismatch: err = %v", err)
	}
}

func TestColumnsErrors(t *testing.T) {
	for name, cols := range map[string][]losses.Column{
		"empty":         nil,
		"one category":  {{Kind: losses.ColumnCategorical, Categories: 1}},
		"unknown kind":  {{Kind: "angle"}},
		"negative sig":  {{Kind: losses.ColumnReal, Sigma: -1}},
		"count sigma":   {{Kind: losses.ColumnCount, Sigma: 2}},
		"real category": {{Kind: losses.ColumnReal, Categories: 2}},
	} {
		if _, err := losses.NewColumns("d", cols, tensor.Float64); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%s: err = %v, want ErrInvalidArgument", name, err)
		}
	}
	if _, err := losses.NewColumns("", []losses.Column{{Kind: losses.ColumnReal, LearnSigma: true}}, tensor.Float64); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("learned sigma without a name: err = %v", err)
	}
	lik, _ := losses.NewColumns("d", mixedSchema, tensor.Float64)
	g := G.NewGraph()
	s := layers.NewScope(g)
	xN := input(g, tensor.Float64, "x", 2, 7, make([]float64, 14))
	oN := input(g, tensor.Float64, "out", 2, 7, make([]float64, 14)) // 7 outputs, want 9
	if _, err := lik.LogProb(s, xN, oN); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("wrong output width: err = %v", err)
	}
}

// Out-of-support values give -Inf (log-probability of an impossible value;
// gonum distuv agrees: Poisson, Bernoulli and LogNormal at these points).
func TestColumnsOutOfSupport(t *testing.T) {
	cols := []losses.Column{{Kind: losses.ColumnPositive}, {Kind: losses.ColumnCount}, {Kind: losses.ColumnBinary}, {Kind: losses.ColumnCategorical, Categories: 2}}
	g := G.NewGraph()
	xN := input(g, tensor.Float64, "x", 1, 4, []float64{-1, 2.5, 0.5, 2})
	oN := input(g, tensor.Float64, "out", 1, 5, make([]float64, 5))
	lsN := input(g, tensor.Float64, "ls", 1, 4, make([]float64, 4))
	lp, err := losses.ColumnsLogProb(cols, xN, oN, lsN)
	if err != nil {
		t.Fatal(err)
	}
	w := watch(lp)
	run(t, g)
	got := values(t, w)
	for j, v := range got {
		if !math.IsInf(v, -1) {
			t.Errorf("column %d: %v, want -Inf", j, v)
		}
	}
	// reference values of distuv at the same points (1 - 1 for categorical 2
	// is outside [0, 2)); LogNormal at -1 and Poisson at 2.5 are -Inf there.
	if v := (distuv.LogNormal{Mu: 0, Sigma: 1}).LogProb(-1); !math.IsInf(v, -1) {
		t.Errorf("distuv LogNormal(-1) = %v", v)
	}
}

// Sample: the sample mean of many draws against the distuv mean of each
// column (5 standard errors; seeded).
func TestColumnsSample(t *testing.T) {
	lik, err := losses.NewColumns("dec", mixedSchema, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	row := []float64{0.3, -1, 0.2, -0.5, 1.2, 0.4, 0.1, 1.0, -0.5}
	const n = 20000
	out := make([]float64, 0, n*9)
	for i := 0; i < n; i++ {
		out = append(out, row...)
	}
	dst := make([]float64, n*7)
	ls := lik.LogSigmas()
	if err := lik.Sample(rand.New(rand.NewPCG(1, 2)), out, ls, dst); err != nil {
		t.Fatal(err)
	}
	type mv struct{ mean, sd float64 }
	lnA := distuv.LogNormal{Mu: 0.2, Sigma: 0.8}
	lnB := distuv.LogNormal{Mu: -0.5, Sigma: math.Exp(ls[3])}
	cat := categorical(row[6:9])
	catMean := 0.0
	catSq := 0.0
	for k := 0; k < 3; k++ {
		catMean += float64(k) * cat.Prob(float64(k))
		catSq += float64(k*k) * cat.Prob(float64(k))
	}
	want := []mv{
		{0.3, 0.5}, {-1, math.Exp(ls[1])},
		{lnA.Mean(), lnA.StdDev()}, {lnB.Mean(), lnB.StdDev()},
		{math.Exp(1.2), math.Sqrt(math.Exp(1.2))},
		{sigmoid(0.4), math.Sqrt(sigmoid(0.4) * (1 - sigmoid(0.4)))},
		{catMean, math.Sqrt(catSq - catMean*catMean)},
	}
	for j, w := range want {
		s := 0.0
		for i := 0; i < n; i++ {
			s += dst[i*7+j]
		}
		m := s / n
		if se := w.sd / math.Sqrt(n); math.Abs(m-w.mean) > 5*se {
			t.Errorf("column %d: sample mean %v, want %v (se %v)", j, m, w.mean, se)
		}
	}
}
