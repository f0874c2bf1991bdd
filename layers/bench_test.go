package layers

import (
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// BenchmarkMLPForwardBackward784x400 times one forward and backward pass of
// a 784-400 ReLU layer on a float32 batch of 100 (the first layer of the
// usual MNIST encoder).
func BenchmarkMLPForwardBackward784x400(b *testing.B) {
	m, err := NewMLP("enc", MLPConfig{Sizes: []int{784, 400}, Output: ReLU}, Options{Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	g := G.NewGraph()
	s := NewScope(g)
	x := G.NewMatrix(g, tensor.Float32, G.WithShape(100, 784), G.WithName("x"), G.WithInit(G.Uniform(0, 1)))
	y, err := m.Forward(s, x)
	if err != nil {
		b.Fatal(err)
	}
	loss := G.Must(G.Sum(y))
	if _, err := G.Grad(loss, s.Nodes()...); err != nil {
		b.Fatal(err)
	}
	vm := G.NewTapeMachine(g, G.BindDualValues(s.Nodes()...))
	defer vm.Close()
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if err := vm.RunAll(); err != nil {
			b.Fatal(err)
		}
		vm.Reset()
	}
}
