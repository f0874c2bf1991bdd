package vae

import (
	"math/rand/v2"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae/dataset"
)

// A feeder prepares the inputs of the coming training steps on a second
// goroutine while the current step runs: it converts the batch's records
// into the model's dtype (dataset.Set.Fill) and draws the step's noise.
// Both are serial work that the graph machine would otherwise do between
// steps while the other cores sit idle. The batches are filled and the
// noise drawn in the order of the steps, from the same generator, so a run
// gives the same bits as filling them in the loop.
type feeder struct {
	out  chan feed
	free chan feed
	stop chan struct{}
	done chan struct{}
}

// feed is one step's inputs: the records (zero beyond the batch) and the
// noise, shaped like the program's x and eps.
type feed struct {
	x, eps *tensor.Dense
	err    error
}

// newFeeder starts filling the batches of one epoch. x and eps give the
// shapes and dtype; noise is only used by the feeder until close returns.
func newFeeder(data *dataset.Set, batches [][]int, width int, x, eps *tensor.Dense, noise *rand.Rand) *feeder {
	const depth = 2 // one feed being used, one being filled
	f := &feeder{out: make(chan feed, depth), free: make(chan feed, depth), stop: make(chan struct{}), done: make(chan struct{})}
	for range depth {
		f.free <- feed{x: tensor.New(tensor.WithShape(x.Shape()...), tensor.Of(x.Dtype())),
			eps: tensor.New(tensor.WithShape(eps.Shape()...), tensor.Of(eps.Dtype()))}
	}
	go func() {
		defer close(f.done)
		for _, idx := range batches {
			var b feed
			select {
			case b = <-f.free:
			case <-f.stop:
				return
			}
			b.x.Zero()
			b.err = fillPrefix(b.x, data, idx, width)
			if b.err == nil {
				b.err = layers.FillNormal(noise, b.eps)
			}
			select {
			case f.out <- b:
			case <-f.stop:
				return
			}
			if b.err != nil {
				return
			}
		}
	}()
	return f
}

// next copies the next step's inputs into x and eps.
func (f *feeder) next(x, eps *tensor.Dense) error {
	b := <-f.out
	if b.err != nil {
		return b.err
	}
	copyInto(x, b.x)
	copyInto(eps, b.eps)
	f.free <- b
	return nil
}

// close stops the feeder and waits for its goroutine to end.
func (f *feeder) close() {
	close(f.stop)
	<-f.done
}
