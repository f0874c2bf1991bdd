package main

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// logProbGraph evaluates sum over rows of the prior's LogProb and its
// gradient with respect to the log-scales, float64.
func logProbGraph(t *testing.T, l *Laplace, z []float64, n int) (vals []float64, total float64, grad []float64) {
	t.Helper()
	g := G.NewGraph()
	s := layers.NewScope(g)
	zt := tensor.New(tensor.WithShape(n, l.dim), tensor.WithBacking(append([]float64(nil), z...)))
	zN := G.NewMatrix(g, tensor.Float64, G.WithShape(n, l.dim), G.WithName("z"), G.WithValue(zt))
	lp, err := l.LogProb(s, zN)
	if err != nil {
		t.Fatal(err)
	}
	sum, err := G.Sum(lp)
	if err != nil {
		t.Fatal(err)
	}
	nodes := s.Nodes()
	if _, err := G.Grad(sum, nodes...); err != nil {
		t.Fatal(err)
	}
	vm := G.NewTapeMachine(g, G.BindDualValues(nodes...))
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		t.Fatal(err)
	}
	gv, err := nodes[0].Grad()
	if err != nil {
		t.Fatal(err)
	}
	return append([]float64(nil), lp.Value().Data().([]float64)...), sum.Value().Data().(float64), append([]float64(nil), gv.Data().([]float64)...)
}

func TestLaplaceLogProbMatchesGonum(t *testing.T) {
	const n, d = 5, 3
	l, err := NewLaplace("prior", d, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	scales := []float64{0.3, 1, 2.5}
	ls := l.logScale.Value.Data().([]float64)
	for i, b := range scales {
		ls[i] = math.Log(b)
	}
	rng := rand.New(rand.NewPCG(1, 2))
	z := make([]float64, n*d)
	for i := range z {
		z[i] = 3 * rng.NormFloat64()
	}
	vals, _, grad := logProbGraph(t, l, z, n)
	for r := 0; r < n; r++ {
		var want float64
		for j := 0; j < d; j++ {
			// reference: gonum stat/distuv Laplace.LogProb
			want += distuv.Laplace{Mu: 0, Scale: scales[j]}.LogProb(z[r*d+j])
		}
		if math.Abs(vals[r]-want) > 1e-12*math.Max(1, math.Abs(want)) {
			t.Errorf("row %d: log p = %v, gonum says %v", r, vals[r], want)
		}
	}
	// reference: gonum diff/fd central differences of the gonum log-density
	// with respect to the log-scales.
	f := func(x []float64) float64 {
		var s float64
		for r := 0; r < n; r++ {
			for j := 0; j < d; j++ {
				s += distuv.Laplace{Mu: 0, Scale: math.Exp(x[j])}.LogProb(z[r*d+j])
			}
		}
		return s
	}
	x0 := make([]float64, d)
	for j := range x0 {
		x0[j] = math.Log(scales[j])
	}
	want := fd.Gradient(nil, f, x0, &fd.Settings{Formula: fd.Central, Step: 1e-6})
	for j := range want {
		if math.Abs(grad[j]-want[j]) > 1e-6*math.Max(1, math.Abs(want[j])) {
			t.Errorf("d/dlogscale[%d] = %v, finite differences say %v", j, grad[j], want[j])
		}
	}
}

func TestLaplaceSampleMoments(t *testing.T) {
	const n = 200000
	l, err := NewLaplace("prior", 2, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	ls := l.logScale.Value.Data().([]float64)
	ls[1] = math.Log(2)
	s, err := l.Sample(rand.New(rand.NewPCG(7, 7)), n)
	if err != nil {
		t.Fatal(err)
	}
	v := s.Data().([]float64)
	for j, b := range []float64{1 / math.Sqrt2, 2} {
		col := make([]float64, n)
		for i := range col {
			col[i] = v[i*2+j]
		}
		mean, variance := stat.MeanVariance(col, nil)
		// reference: a Laplace(0, b) has mean 0 and variance 2 b^2 (gonum
		// stat/distuv Laplace.Variance). The standard error of the mean is
		// sqrt(2 b^2 / n); of the variance about sqrt(20 b^4 / n) (fourth
		// moment 24 b^4, from memory). Five standard errors: a false alarm
		// with this fixed seed is not possible, a wrong scale is caught.
		wantVar := distuv.Laplace{Mu: 0, Scale: b}.Variance()
		if math.Abs(mean) > 5*math.Sqrt(wantVar/n) {
			t.Errorf("dim %d: sample mean %v, want 0", j, mean)
		}
		if math.Abs(variance-wantVar) > 5*math.Sqrt(20*b*b*b*b/n) {
			t.Errorf("dim %d: sample variance %v, want %v", j, variance, wantVar)
		}
	}
}

func TestLaplaceBadInput(t *testing.T) {
	if _, err := NewLaplace("p", 0, tensor.Float64); err == nil {
		t.Error("dim 0: no error")
	}
	l, err := NewLaplace("p", 2, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := l.Sample(nil, 3); err == nil {
		t.Error("nil rng: no error")
	}
	g := G.NewGraph()
	z := G.NewMatrix(g, tensor.Float64, G.WithShape(4, 3), G.WithName("z"))
	if _, err := l.LogProb(layers.NewScope(g), z); err == nil {
		t.Error("wrong width: no error")
	}
}
