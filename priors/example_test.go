package priors_test

import (
	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/priors"
)

// Log-densities of two latent vectors under N(0, I) in two dimensions:
// -log(2 pi) at the origin and one less at (1, 1).
func ExampleStandardNormal_LogProb() {
	p, err := priors.NewStandardNormal(2, tensor.Float64)
	if err != nil {
		panic(err)
	}
	g := G.NewGraph()
	s := layers.NewScope(g)
	z := G.NewMatrix(g, tensor.Float64, G.WithShape(2, 2), G.WithName("z"),
		G.WithValue(tensor.New(tensor.WithShape(2, 2), tensor.WithBacking([]float64{0, 0, 1, 1}))))
	logp, err := p.LogProb(s, z)
	if err != nil {
		panic(err)
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		panic(err)
	}
	fmt.Printf("%.6f\n", logp.Value().Data())
	// Output: [-1.837877 -2.837877]
}

// A mixture of two components placed at -1 and +1 (unit variances, equal
// weights) in one dimension: the density at 0 is N(1; 0, 1), and at 1 it
// averages N(0; 0, 1) and N(2; 0, 1).
func ExampleMixture_LogProb() {
	p, err := priors.NewMixture("prior", 2, 1, priors.MixtureOptions{Dtype: tensor.Float64})
	if err != nil {
		panic(err)
	}
	copy(p.Params()[1].Value.Data().([]float64), []float64{-1, 1}) // name.means
	g := G.NewGraph()
	s := layers.NewScope(g)
	z := G.NewMatrix(g, tensor.Float64, G.WithShape(2, 1), G.WithName("z"),
		G.WithValue(tensor.New(tensor.WithShape(2, 1), tensor.WithBacking([]float64{0, 1}))))
	logp, err := p.LogProb(s, z)
	if err != nil {
		panic(err)
	}
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		panic(err)
	}
	fmt.Printf("%.6f\n", logp.Value().Data())
	// Output: [-1.418939 -1.485158]
}
