package losses_test

import (
	"math"
	"math/rand/v2"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
)

// freeBitsRef is the free-bits KL term of Kingma et al. 2016 (appendix,
// free bits; from memory): sum_j max(lambda, kl_j), written out.
func freeBitsRef(kl []float64, lambda float64) float64 {
	s := 0.0
	for _, v := range kl {
		s += math.Max(lambda, v)
	}
	return s
}

// TestFreeBitsMatchesReference checks the value against the paper's sum of
// maxima and the gradient against gonum diff/fd central differences, with
// some dimensions above lambda and some below (each at least 0.05 from it,
// far beyond the difference step 1e-5, so no difference straddles the
// kink). The gradient with respect to lambda is the number of clamped
// dimensions, also checked by the differences.
func TestFreeBitsMatchesReference(t *testing.T) {
	kl := []float64{0.9, 0.1, 0.35, 0.02, 1.7}
	const lambda = 0.3
	gradCheck(t, "FreeBits", []arg{{"kl", 1, len(kl), kl}, {"lambda", 0, 0, []float64{lambda}}},
		func(in []*G.Node) (*G.Node, error) { return losses.FreeBits(in[0], in[1]) },
		func(in [][]float64) []float64 { return []float64{freeBitsRef(in[0], in[1][0])} })
	// One group: the floor on the total.
	gradCheck(t, "FreeBits scalar", []arg{{"kl", 0, 0, []float64{0.4}}, {"lambda", 0, 0, []float64{0.9}}},
		func(in []*G.Node) (*G.Node, error) { return losses.FreeBits(in[0], in[1]) },
		func(in [][]float64) []float64 { return []float64{freeBitsRef(in[0], in[1][0])} })
}

// TestFreeBitsGradientIsExact: the gradient with respect to each kl[j] is
// exactly 0 below lambda and exactly 1 above it, in both dtypes and for a
// vector kl: a clamped dimension gets no push towards the prior at all
// (Kingma et al. 2016, free bits).
func TestFreeBitsGradientIsExact(t *testing.T) {
	kl := []float64{0.9, 0.1, 0.35, 0.02, 1.7}
	const lambda = 0.3
	for _, dt := range dtypes {
		g := G.NewGraph()
		k := G.NewVector(g, dt, G.WithShape(len(kl)), G.WithName("kl"), G.WithValue(denseOf(dt, []int{len(kl)}, kl)))
		lam := scalarInput(g, dt, "lambda", lambda)
		out, err := losses.FreeBits(k, lam)
		if err != nil {
			t.Fatal(err)
		}
		grads, err := G.Grad(out, k)
		if err != nil {
			t.Fatal(err)
		}
		ow, gw := watch(out), watch(grads[0])
		run(t, g)
		tol := 1e-15
		if dt == tensor.Float32 {
			tol = 1e-6
		}
		checkAll(t, dt.String()+" FreeBits value", values(t, ow), []float64{freeBitsRef(kl, lambda)}, tol, 1)
		for j, v := range values(t, gw) {
			want := 0.0
			if kl[j] > lambda {
				want = 1
			}
			if v != want {
				t.Errorf("%v: d/dkl[%d] = %v with kl %v and lambda %v, want exactly %v", dt, j, v, kl[j], lambda, want)
			}
		}
	}
}

// The lambda node can change between runs without rebuilding the graph.
func TestFreeBitsLambdaIsLive(t *testing.T) {
	kl := []float64{0.9, 0.1, 0.35}
	g := G.NewGraph()
	k := input(g, tensor.Float64, "kl", 1, 3, kl)
	lam := scalarInput(g, tensor.Float64, "lambda", 0)
	out, err := losses.FreeBits(k, lam)
	if err != nil {
		t.Fatal(err)
	}
	ow := watch(out)
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	for _, l := range []float64{0, 0.2, 0.5, 2} {
		if err := G.Let(lam, l); err != nil {
			t.Fatal(err)
		}
		if err := vm.RunAll(); err != nil {
			t.Fatal(err)
		}
		checkAll(t, "FreeBits", values(t, ow), []float64{freeBitsRef(kl, l)}, 1e-15, 1)
		vm.Reset()
	}
}

// TestCapacityPenaltyMatchesReference: gamma*|kl - C| (Burgess et al.
// 2018, section 5; from memory) written out, and its gradient against gonum
// diff/fd central differences, on both sides of the target.
func TestCapacityPenaltyMatchesReference(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	for _, kl := range []float64{0.7, 4.2} {
		target, gamma := 2.5, 1+rng.Float64()*10
		gradCheck(t, "CapacityPenalty", []arg{{"kl", 0, 0, []float64{kl}}, {"target", 0, 0, []float64{target}}, {"gamma", 0, 0, []float64{gamma}}},
			func(in []*G.Node) (*G.Node, error) { return losses.CapacityPenalty(in[0], in[1], in[2]) },
			func(in [][]float64) []float64 { return []float64{in[2][0] * math.Abs(in[0][0]-in[1][0])} })
	}
}

func TestObjectiveBadInput(t *testing.T) {
	g := G.NewGraph()
	m := input(g, tensor.Float64, "m", 2, 3, make([]float64, 6))
	row := input(g, tensor.Float64, "row", 1, 3, make([]float64, 3))
	vec32 := G.NewVector(g, tensor.Float32, G.WithShape(3), G.WithName("vec32"), G.WithValue(tensor.New(tensor.WithBacking([]float32{0, 0, 0}))))
	s := scalarInput(g, tensor.Float64, "s", 1)
	s32 := scalarInput(g, tensor.Float32, "s32", 1)
	ints := G.NewScalar(g, tensor.Int, G.WithName("int"), G.WithValue(1))
	cases := []struct {
		name string
		arg  string
		call func() (*G.Node, error)
	}{
		{"FreeBits nil kl", "kl", func() (*G.Node, error) { return losses.FreeBits(nil, s) }},
		{"FreeBits nil lambda", "lambda", func() (*G.Node, error) { return losses.FreeBits(row, nil) }},
		{"FreeBits matrix kl", "kl", func() (*G.Node, error) { return losses.FreeBits(m, s) }},
		{"FreeBits integer kl", "kl", func() (*G.Node, error) { return losses.FreeBits(ints, s) }},
		{"FreeBits row lambda", "lambda", func() (*G.Node, error) { return losses.FreeBits(row, row) }},
		{"FreeBits lambda dtype", "lambda", func() (*G.Node, error) { return losses.FreeBits(vec32, s) }},
		{"CapacityPenalty nil kl", "kl", func() (*G.Node, error) { return losses.CapacityPenalty(nil, s, s) }},
		{"CapacityPenalty nil target", "target", func() (*G.Node, error) { return losses.CapacityPenalty(s, nil, s) }},
		{"CapacityPenalty nil gamma", "gamma", func() (*G.Node, error) { return losses.CapacityPenalty(s, s, nil) }},
		{"CapacityPenalty row kl", "kl", func() (*G.Node, error) { return losses.CapacityPenalty(row, s, s) }},
		{"CapacityPenalty row gamma", "gamma", func() (*G.Node, error) { return losses.CapacityPenalty(s, s, row) }},
		{"CapacityPenalty target dtype", "target", func() (*G.Node, error) { return losses.CapacityPenalty(s, s32, s) }},
		{"CapacityPenalty integer kl", "kl", func() (*G.Node, error) { return losses.CapacityPenalty(ints, s, s) }},
	}
	checkBad(t, cases)
}
