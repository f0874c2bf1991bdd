package layers_test

import (
	"fmt"
	"math/rand/v2"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

func ExampleNewDense() {
	d, err := layers.NewDense("enc.fc", 3, 2, layers.Options{Dtype: tensor.Float64, Init: layers.Zeros})
	if err != nil {
		panic(err)
	}
	// Set the bias to (1, -1) so the output is easy to predict.
	copy(d.Bias().Value.Data().([]float64), []float64{1, -1})

	g := G.NewGraph()
	s := layers.NewScope(g)
	x := G.NewMatrix(g, tensor.Float64, G.WithShape(4, 3), G.WithName("x"), G.WithInit(G.Ones()))
	y, err := d.Forward(s, x)
	if err != nil {
		panic(err)
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	if err := m.RunAll(); err != nil {
		panic(err)
	}
	for _, p := range d.Params() {
		fmt.Println(p.Name, p.Value.Shape())
	}
	fmt.Println(y.Shape(), y.Value().Data().([]float64)[:2])
	// Output:
	// enc.fc.weight (3, 2)
	// enc.fc.bias (1, 2)
	// (4, 2) [1 -1]
}

func ExampleNewMLP() {
	enc, err := layers.NewMLP("enc", layers.MLPConfig{
		Sizes:      []int{784, 400, 200},
		Activation: layers.ReLU,
	}, layers.Options{Seed: 1})
	if err != nil {
		panic(err)
	}
	for _, p := range enc.Params() {
		fmt.Println(p.Name, p.Value.Shape(), p.Value.Dtype())
	}
	spec := enc.Spec()
	fmt.Println(spec.Kind, string(spec.Config))
	// Output:
	// enc.0.weight (784, 400) float32
	// enc.0.bias (1, 400) float32
	// enc.1.weight (400, 200) float32
	// enc.1.bias (1, 200) float32
	// mlp {"name":"enc","sizes":[784,400,200],"activation":"relu","output":"identity"}
}

func ExampleReparameterize() {
	opt := layers.Options{Dtype: tensor.Float64, Seed: 7}
	body, err := layers.NewMLP("enc", layers.MLPConfig{Sizes: []int{6, 8}, Output: layers.ReLU}, opt)
	if err != nil {
		panic(err)
	}
	head, err := layers.NewGaussianHead("enc.head", 8, 2, opt)
	if err != nil {
		panic(err)
	}

	const batch, k = 5, 3 // k samples per record
	g := G.NewGraph()
	s := layers.NewScope(g)
	x := G.NewMatrix(g, tensor.Float64, G.WithShape(batch, 6), G.WithName("x"), G.WithInit(G.Ones()))
	h, err := body.Forward(s, x)
	if err != nil {
		panic(err)
	}
	mu, logVar, err := head.Forward(s, h)
	if err != nil {
		panic(err)
	}
	epsT := tensor.New(tensor.Of(tensor.Float64), tensor.WithShape(k*batch, head.Latent()))
	eps := G.NewMatrix(g, tensor.Float64, G.WithShape(k*batch, head.Latent()), G.WithName("eps"), G.WithValue(epsT))
	z, err := layers.Reparameterize(mu, logVar, eps)
	if err != nil {
		panic(err)
	}
	// Gradients reach every parameter through z.
	loss, _ := G.Sum(z)
	if _, err := G.Grad(loss, s.Nodes()...); err != nil {
		panic(err)
	}
	m := G.NewTapeMachine(g)
	defer m.Close()
	// Before each run, fill eps with fresh noise from a seeded source.
	rng := rand.New(rand.NewPCG(1, 2))
	if err := layers.FillNormal(rng, epsT); err != nil {
		panic(err)
	}
	if err := m.RunAll(); err != nil {
		panic(err)
	}
	fmt.Println("z", z.Shape())
	fmt.Println("parameters bound:", len(s.Params()))
	// Output:
	// z (15, 2)
	// parameters bound: 6
}
