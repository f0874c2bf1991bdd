package priors

import (
	"math"
	"slices"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/mat"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// The VampPrior with image-shaped pseudo-inputs (issue 8, item 14). Its
// parameter is stored as (K, F) and reshaped to (K, C, H, W) inside the
// graph; a reshape that shared the parameter's memory let an in-place op
// of the encoder (ELU first) write into the pseudo-inputs, and one training
// step left them all zeros for negative entries. The reference here works
// on the flat (K, F) numbers with gonum and plain loops, and never builds a
// gorgonia graph, so it cannot share that fault.

// eluRef is ELU with alpha = 1 (Clevert, Unterthiner and Hochreiter 2016,
// "Fast and Accurate Deep Network Learning by Exponential Linear Units"):
// x for x >= 0, exp(x) - 1 below.
func eluRef(x float64) float64 {
	if x >= 0 {
		return x
	}
	return math.Expm1(x)
}

// softplusRef is log(1 + exp(x)), written stably (common practice).
func softplusRef(x float64) float64 {
	return math.Max(x, 0) + math.Log1p(math.Exp(-math.Abs(x)))
}

// conv2DRef is a stride-1, unpadded cross-correlation of one (c, h, w)
// record with kernels w (out, c, kh, kw) plus one bias per output channel,
// the textbook definition (Goodfellow, Bengio and Courville 2016, "Deep
// Learning", eq. 9.6). It returns the (out, h-kh+1, w-kw+1) map row-major.
func conv2DRef(x []float64, c, h, w int, k []float64, out, kh, kw int, bias []float64) []float64 {
	oh, ow := h-kh+1, w-kw+1
	y := make([]float64, out*oh*ow)
	for o := range out {
		for i := range oh {
			for j := range ow {
				s := bias[o]
				for ch := range c {
					for a := range kh {
						for b := range kw {
							s += k[((o*c+ch)*kh+a)*kw+b] * x[(ch*h+i+a)*w+j+b]
						}
					}
				}
				y[(o*oh+i)*ow+j] = s
			}
		}
	}
	return y
}

// denseRef returns x W + b for x (n, in), W (in, out), b (out), with gonum mat.
func denseRef(x []float64, n, in int, w []float64, out int, b []float64) []float64 {
	var y mat.Dense
	y.Mul(mat.NewDense(n, in, x), mat.NewDense(in, out, w))
	for i := range n {
		for j := range out {
			y.Set(i, j, y.At(i, j)+b[j])
		}
	}
	return y.RawMatrix().Data
}

// vampImageCase is an encoder over image-shaped records with a reference
// implementation of the same function of one record.
type vampImageCase struct {
	name  string
	shape []int // C, H, W
	enc   layers.Layer
	// features maps one flat record (C*H*W values, row-major C, H, W) to
	// the encoder output, with the parameter values read at the start.
	features func(x []float64) []float64
	width    int // encoder output width
}

func vampImageCases(t *testing.T) []vampImageCase {
	t.Helper()
	opt := layers.Options{Dtype: tensor.Float64, Seed: 21}
	var cases []vampImageCase

	// {1, 4, 4}: ELU first, then Flatten and Dense(16, 5): the case of the issue.
	d1, err := layers.NewDense("enc.dense", 16, 5, opt)
	if err != nil {
		t.Fatal(err)
	}
	setParam(t, d1.Bias(), randVals(31, 5, 0.3, 0)) // a non-zero bias, so it is checked too
	enc1, err := layers.NewSequential("enc", layers.ELU, layers.NewFlatten("flat"), d1)
	if err != nil {
		t.Fatal(err)
	}
	w1, b1 := mustValues(t, d1.Weight().Value), mustValues(t, d1.Bias().Value)
	cases = append(cases, vampImageCase{"1x4x4 elu-flatten-dense", []int{1, 4, 4}, enc1, func(x []float64) []float64 {
		h := make([]float64, len(x))
		for i, v := range x {
			h[i] = eluRef(v) // flattening (1,4,4) row-major keeps the order
		}
		return denseRef(h, 1, 16, w1, 5, b1)
	}, 5})

	// {2, 3, 3}: ELU, a 2x2 convolution to 2 channels (2, 2, 2), Flatten,
	// Dense(8, 5): two channels, so the (C, H, W) order of the flat
	// pseudo-input matters.
	conv, err := layers.NewConv2D("enc.conv", layers.Conv2DConfig{In: 2, Out: 2, Kernel: [2]int{2, 2}}, opt)
	if err != nil {
		t.Fatal(err)
	}
	setParam(t, conv.Params()[1], []float64{0.2, -0.1})
	d2, err := layers.NewDense("enc.dense", 8, 5, opt)
	if err != nil {
		t.Fatal(err)
	}
	enc2, err := layers.NewSequential("enc", layers.ELU, conv, layers.NewFlatten("flat"), d2)
	if err != nil {
		t.Fatal(err)
	}
	kw, kb := mustValues(t, conv.Params()[0].Value), mustValues(t, conv.Params()[1].Value)
	w2, b2 := mustValues(t, d2.Weight().Value), mustValues(t, d2.Bias().Value)
	cases = append(cases, vampImageCase{"2x3x3 elu-conv-flatten-dense", []int{2, 3, 3}, enc2, func(x []float64) []float64 {
		h := make([]float64, len(x))
		for i, v := range x {
			h[i] = eluRef(v)
		}
		return denseRef(conv2DRef(h, 2, 3, 3, kw, 2, 2, 2, kb), 1, 8, w2, 5, b2)
	}, 5})
	return cases
}

// vampRef returns log p(z_n) for the VampPrior over flat pseudo-inputs u
// (k records of f values): p(z) = (1/K) sum_k N(z; mu(u_k), diag(exp
// lv(u_k))) (Tomczak and Welling 2018, eq. 9), where mu and the raw
// log-variance are Dense maps of the encoder features and lv is the
// head's documented soft clamp r + softplus(lo - r) - softplus(r - hi).
func vampRef(t *testing.T, c vampImageCase, head *layers.GaussianHead, u []float64, k, f int, z []float64, d int) []float64 {
	t.Helper()
	hp := head.Params()
	wm, bm := mustValues(t, hp[0].Value), mustValues(t, hp[1].Value)
	wl, bl := mustValues(t, hp[2].Value), mustValues(t, hp[3].Value)
	mu := make([]float64, 0, k*d)
	lv := make([]float64, 0, k*d)
	for i := range k {
		h := c.features(u[i*f : (i+1)*f])
		mu = append(mu, denseRef(h, 1, c.width, wm, d, bm)...)
		for _, r := range denseRef(h, 1, c.width, wl, d, bl) {
			lv = append(lv, r+softplusRef(layers.LogVarMin-r)-softplusRef(r-layers.LogVarMax))
		}
	}
	n := len(z) / d
	out := make([]float64, n)
	terms := make([]float64, k)
	for i := range n {
		for j := range k {
			// reference: gonum stat/distmv Normal.LogProb
			terms[j] = gonumNormal(t, mu[j*d:(j+1)*d], lv[j*d:(j+1)*d]).LogProb(z[i*d : (i+1)*d])
		}
		out[i] = floats.LogSumExp(terms) - math.Log(float64(k)) // reference: gonum floats.LogSumExp
	}
	return out
}

func TestVampImageInputsAgainstReference(t *testing.T) {
	const k, d, n = 3, 2, 4
	for _, c := range vampImageCases(t) {
		t.Run(c.name, func(t *testing.T) {
			head, err := layers.NewGaussianHead("head", c.width, d, layers.Options{Dtype: tensor.Float64, Seed: 22})
			if err != nil {
				t.Fatal(err)
			}
			p, err := NewVamp("vamp", k, c.shape, c.enc, head, VampOptions{Dtype: tensor.Float64, Seed: 5})
			if err != nil {
				t.Fatal(err)
			}
			f := 1
			for _, s := range c.shape {
				f *= s
			}
			pseudo := p.Params()[0]
			if got := pseudo.Value.Shape(); !got.Eq(tensor.Shape{k, f}) {
				t.Fatalf("pseudo-inputs shape %v, want (%d, %d)", got, k, f)
			}
			// Half of the pseudo-inputs negative, where ELU is not the identity.
			u0 := randVals(33, k*f, 1, 0)
			setParam(t, pseudo, u0)
			z := randVals(34, n*d, 1, 0)
			want := vampRef(t, c, head, u0, k, f, z, d)
			// Gradient of sum_n log p(z_n) in u: gonum diff/fd central
			// differences of the reference.
			wantGrad := fd.Gradient(nil, func(u []float64) float64 {
				return floats.Sum(vampRef(t, c, head, u, k, f, z, d))
			}, slices.Clone(u0), &fd.Settings{Formula: fd.Central})

			// One training graph: log p, its sum and the gradients of every
			// bound parameter, as a trainer builds it.
			g := G.NewGraph()
			s := layers.NewScope(g)
			zn := inputNode(g, tensor.Float64, z, n, d, "z")
			lp, err := p.LogProb(s, zn)
			if err != nil {
				t.Fatal(err)
			}
			cost, err := G.Sum(lp)
			if err != nil {
				t.Fatal(err)
			}
			nodes := s.Nodes()
			if _, err := G.Grad(cost, nodes...); err != nil {
				t.Fatal(err)
			}
			vm := G.NewTapeMachine(g, G.BindDualValues(nodes...))
			defer vm.Close()
			pn := s.Bind(pseudo)
			for run := range 2 { // a second step must see the same numbers
				if err := vm.RunAll(); err != nil {
					t.Fatal(err)
				}
				// Running the graph must leave the parameter alone.
				if got := mustValues(t, pseudo.Value); !slices.Equal(got, u0) {
					t.Fatalf("run %d wrote into the pseudo-inputs: %v, were %v", run, got, u0)
				}
				if sh := pseudo.Value.Shape(); !sh.Eq(tensor.Shape{k, f}) {
					t.Fatalf("run %d reshaped the parameter to %v", run, sh)
				}
				got := mustValues(t, lp.Value().(*tensor.Dense))
				for i := range want {
					// float64 throughout; the two computations round differently
					// in the last bits only, so 1e-10 relative is ample.
					if !closeRel(got[i], want[i], 1e-10) {
						t.Errorf("run %d, row %d: log p = %.15g, reference %.15g", run, i, got[i], want[i])
					}
				}
				gv, err := pn.Grad()
				if err != nil {
					t.Fatal(err)
				}
				grad := mustValues(t, gv.(*tensor.Dense))
				for i := range wantGrad {
					// Central differences of a smooth float64 function are good
					// to about 1e-8 here; 1e-6 relative separates a wrong gradient.
					if !closeRel(grad[i], wantGrad[i], 1e-6) {
						t.Errorf("run %d: d/du[%d] = %.10g, finite difference of the reference %.10g", run, i, grad[i], wantGrad[i])
					}
				}
				// Gorgonia adds gradients up across runs; zero them for the
				// next run, as an optimizer step does.
				for _, nd := range nodes {
					if gv, err := nd.Grad(); err == nil {
						gv.(*tensor.Dense).Zero()
					}
				}
				vm.Reset()
			}
			// Posteriors and Sample build their own graph: still no writes.
			if _, _, err := p.Posteriors(); err != nil {
				t.Fatal(err)
			}
			if got := mustValues(t, pseudo.Value); !slices.Equal(got, u0) {
				t.Fatalf("Posteriors wrote into the pseudo-inputs")
			}
		})
	}
}
