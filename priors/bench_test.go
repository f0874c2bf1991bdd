package priors

import (
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// BenchmarkMixtureLogProb runs log p(z) of a 10-component mixture for a
// batch of 128 latent vectors of width 16 (float32), graph built once.
func BenchmarkMixtureLogProb(b *testing.B) {
	const n, k, d = 128, 10, 16
	p, err := NewMixture("mix", k, d, MixtureOptions{Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	g := G.NewGraph()
	s := layers.NewScope(g)
	z := inputNode(g, tensor.Float32, randVals(1, n*d, 1, 0), n, d, "z")
	lp, err := p.LogProb(s, z)
	if err != nil {
		b.Fatal(err)
	}
	cost, err := G.Sum(lp)
	if err != nil {
		b.Fatal(err)
	}
	if _, err := G.Grad(cost, s.Nodes()...); err != nil {
		b.Fatal(err)
	}
	vm := G.NewTapeMachine(g, G.BindDualValues(s.Nodes()...))
	defer vm.Close()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if err := vm.RunAll(); err != nil {
			b.Fatal(err)
		}
		vm.Reset()
	}
}
