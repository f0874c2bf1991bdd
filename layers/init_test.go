package layers

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
	"gorgonia.org/tensor"
)

// sampleStats returns the mean and standard deviation of p's values.
func sampleStats(p *Param) (mean, std float64, data []float64) {
	data = toF64(p.Value.Data())
	mean, std = stat.MeanStdDev(data, nil)
	return mean, std, data
}

func TestInitScaleMatchesPublishedFormulas(t *testing.T) {
	// Each matrix has n >= 2e5 entries. The sample standard deviation of n
	// independent draws has a relative standard error of about
	// sqrt((kurtosis-1)/4n) <= 1/sqrt(2n) ~ 0.16%; a 1% tolerance is over
	// 6 standard errors. The mean's standard error is std/sqrt(n) ~ 0.22%
	// of std; we allow 1% of std.
	type tc struct {
		name      string
		scheme    Init
		in, out   int
		act       Activation
		wantStd   float64
		uniformTo float64 // > 0: every |w| must be below this bound
	}
	cases := []tc{
		// Glorot and Bengio 2010, eq. 16: U(-a, a), a = sqrt(6/(in+out)),
		// variance a^2/3 = 2/(in+out).
		{"glorot_uniform", GlorotUniform, 784, 400, Identity, math.Sqrt(2.0 / (784 + 400)), math.Sqrt(6.0 / (784 + 400))},
		{"glorot_normal", GlorotNormal, 784, 400, Tanh, math.Sqrt(2.0 / (784 + 400)), 0},
		// He et al. 2015, eq. 10 / eq. 15: variance 2/((1+a^2) fanIn).
		{"he_normal relu", HeNormal, 784, 400, ReLU, math.Sqrt(2.0 / 784), 0},
		{"he_normal leaky", HeNormal, 600, 500, LeakyReLU, math.Sqrt(2.0 / ((1 + 1e-4) * 600)), 0},
		{"he_uniform", HeUniform, 784, 400, ReLU, math.Sqrt(2.0 / 784), math.Sqrt(6.0 / 784)},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			d, err := newDense("test", "w", c.in, c.out, Options{Dtype: tensor.Float64, Seed: 3, Init: c.scheme}, c.act)
			if err != nil {
				t.Fatal(err)
			}
			mean, std, data := sampleStats(d.Weight())
			if math.Abs(std-c.wantStd) > 0.01*c.wantStd {
				t.Errorf("std %v, want %v", std, c.wantStd)
			}
			if math.Abs(mean) > 0.01*c.wantStd {
				t.Errorf("mean %v, want 0 (std %v)", mean, c.wantStd)
			}
			if got := InitStd(c.scheme, c.in, c.out, c.act); math.Abs(got-c.wantStd) > 1e-15 {
				t.Errorf("InitStd = %v, want %v", got, c.wantStd)
			}
			if c.uniformTo > 0 {
				for _, v := range data {
					if math.Abs(v) >= c.uniformTo {
						t.Fatalf("uniform draw %v outside (-%v, %v)", v, c.uniformTo, c.uniformTo)
					}
				}
			} else {
				// Shape check: the fraction within one std of zero is
				// 0.6827 for a normal (reference: gonum distuv.Normal CDF)
				// and 0.577 for a uniform. Binomial standard error
				// sqrt(p(1-p)/n) ~ 0.001; tolerance 0.01.
				ref := distuv.Normal{Mu: 0, Sigma: 1}
				want := ref.CDF(1) - ref.CDF(-1)
				in := 0
				for _, v := range data {
					if math.Abs(v) < c.wantStd {
						in++
					}
				}
				if got := float64(in) / float64(len(data)); math.Abs(got-want) > 0.01 {
					t.Errorf("fraction within one std %v, want %v", got, want)
				}
			}
			for _, v := range toF64(d.Bias().Value.Data()) {
				if v != 0 {
					t.Fatalf("bias %v, want zero", v)
				}
			}
		})
	}
}

func TestInitAutoFollowsActivation(t *testing.T) {
	// Hidden relu layer -> He normal; identity output -> Glorot uniform;
	// conv fans include the kernel area.
	m, err := NewMLP("m", MLPConfig{Sizes: []int{900, 600, 500}, Activation: ReLU}, Options{Dtype: tensor.Float64, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	_, s0, _ := sampleStats(m.Layers()[0].Weight())
	_, s1, _ := sampleStats(m.Layers()[1].Weight())
	if want := math.Sqrt(2.0 / 900); math.Abs(s0-want) > 0.01*want { // He et al. 2015
		t.Errorf("hidden relu layer std %v, want %v", s0, want)
	}
	if want := math.Sqrt(2.0 / 1100); math.Abs(s1-want) > 0.01*want { // Glorot and Bengio 2010
		t.Errorf("identity output layer std %v, want %v", s1, want)
	}
	c, err := NewConv2D("c", Conv2DConfig{In: 16, Out: 32, Kernel: [2]int{5, 5}, Activation: ELU}, Options{Dtype: tensor.Float64, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	_, sc, _ := sampleStats(c.Params()[0])
	if want := math.Sqrt(2.0 / (16 * 25)); math.Abs(sc-want) > 0.02*want { // He et al. 2015, fanIn = in*kh*kw; n = 12800
		t.Errorf("conv std %v, want %v", sc, want)
	}
}

func TestInitDeterminism(t *testing.T) {
	build := func(seed uint64, dt tensor.Dtype) []*Param {
		m, err := NewMLP("m", MLPConfig{Sizes: []int{20, 10, 5}}, Options{Dtype: dt, Seed: seed})
		if err != nil {
			t.Fatal(err)
		}
		return m.Params()
	}
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		a, b, c := build(9, dt), build(9, dt), build(10, dt)
		for i := range a {
			va, vb, vc := toF64(a[i].Value.Data()), toF64(b[i].Value.Data()), toF64(c[i].Value.Data())
			same, differ := true, false
			for j := range va {
				if math.Float64bits(va[j]) != math.Float64bits(vb[j]) {
					same = false
				}
				if va[j] != vc[j] {
					differ = true
				}
			}
			if !same {
				t.Errorf("%v %s: same seed gave different values", dt, a[i].Name)
			}
			isBias := i%2 == 1
			if !isBias && !differ {
				t.Errorf("%v %s: seeds 9 and 10 gave identical values", dt, a[i].Name)
			}
		}
		// Layers with different names draw different numbers from one seed.
		w0, w1 := toF64(a[0].Value.Data()), toF64(a[2].Value.Data())
		if w0[0] == w1[0] && w0[1] == w1[1] {
			t.Errorf("%v: layers m.0 and m.1 drew the same numbers", dt)
		}
	}
}
