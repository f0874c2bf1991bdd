package losses_test

import (
	"fmt"
	"math"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
)

// KL of two encoder outputs from the standard normal prior, per dimension,
// per record and for the batch. By hand: 0.5*(exp(lv) + mu^2 - 1 - lv),
// so (mu, var) = (0, 1) gives 0 and (1, 2) gives 0.5*(2 - ln 2) = 0.6534.
func ExampleKLStandardNormal() {
	g := G.NewGraph()
	mu := G.NewMatrix(g, tensor.Float64, G.WithShape(2, 2), G.WithName("mu"),
		G.WithValue(tensor.New(tensor.WithShape(2, 2), tensor.WithBacking([]float64{0, 1, 0.5, -0.5}))))
	logVar := G.NewMatrix(g, tensor.Float64, G.WithShape(2, 2), G.WithName("logVar"),
		G.WithValue(tensor.New(tensor.WithShape(2, 2), tensor.WithBacking([]float64{0, math.Ln2, 0, 0}))))

	perDim, err := losses.KLStandardNormal(mu, logVar)
	if err != nil {
		panic(err)
	}
	perSample, err := losses.PerSample(perDim)
	if err != nil {
		panic(err)
	}
	total, err := losses.BatchTotal(perSample)
	if err != nil {
		panic(err)
	}
	// Read copies values as the graph runs; an intermediate node's own
	// value may be overwritten by later ops.
	var d, s, tot G.Value
	G.Read(perDim, &d)
	G.Read(perSample, &s)
	G.Read(total, &tot)

	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		panic(err)
	}
	fmt.Printf("per dimension: %.4f\n", d.Data())
	fmt.Printf("per record:    %.4f\n", s.Data())
	fmt.Printf("batch total:   %.4f\n", tot.Data())
	// Output:
	// per dimension: [0.0000 0.6534 0.1250 0.1250]
	// per record:    [0.6534 0.2500]
	// batch total:   0.9034
}

// Bernoulli log-likelihoods stay finite and exact for extreme logits. By
// hand: log sigmoid(0) = -ln 2 = -0.6931; for x = 0 and logit 2,
// -log(1 + e^2) = -2.1269; for x = 0 and logit 1e4, -1e4 (a naive
// log(1 - sigmoid(1e4)) would give -Inf).
func ExampleBernoulliLogProb() {
	g := G.NewGraph()
	x := G.NewMatrix(g, tensor.Float32, G.WithShape(1, 4), G.WithName("x"),
		G.WithValue(tensor.New(tensor.WithShape(1, 4), tensor.WithBacking([]float32{1, 0, 0, 1}))))
	logits := G.NewMatrix(g, tensor.Float32, G.WithShape(1, 4), G.WithName("logits"),
		G.WithValue(tensor.New(tensor.WithShape(1, 4), tensor.WithBacking([]float32{0, 2, 1e4, 1e4}))))

	lp, err := losses.BernoulliLogProb(x, logits)
	if err != nil {
		panic(err)
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		panic(err)
	}
	fmt.Printf("%.4f\n", lp.Value().Data())
	// Output:
	// [-0.6931 -2.1269 -10000.0000 0.0000]
}
