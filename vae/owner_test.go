package vae

import (
	"context"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// hidingLayer runs its inner layer but lists only the parameters after the
// first: a user layer that forgets one of its parameters.
type hidingLayer struct{ inner layers.Layer }

func (h hidingLayer) Forward(s *layers.Scope, x *G.Node) (*G.Node, error) {
	return h.inner.Forward(s, x)
}
func (h hidingLayer) Params() []*layers.Param { return h.inner.Params()[1:] }

// hidingLikelihood is a learned-sigma Gaussian that lists no parameters.
type hidingLikelihood struct{ *losses.LearnedGaussian }

func (hidingLikelihood) Params() []*layers.Param { return nil }

// meanScaleLikelihood is Bernoulli whose Mean (only) multiplies by a
// parameter it does not list: the evaluation graph New builds never binds
// it, the reconstruction graph does.
type meanScaleLikelihood struct {
	losses.Bernoulli
	scale *layers.Param
}

func (l meanScaleLikelihood) Mean(s *layers.Scope, out *G.Node) (*G.Node, error) {
	m, err := l.Bernoulli.Mean(s, out)
	if err != nil {
		return nil, err
	}
	return G.BroadcastHadamardProd(m, s.Bind(l.scale), nil, []byte{0})
}

// TestUnlistedParameterRejected: a parameter that a part binds in a graph
// but does not list would be trained but never saved, snapshotted or
// restored. The model refuses it with an error naming the part and the
// parameter: at New when the graph New builds binds it, else at the first
// call whose graph does, before any step or result.
func TestUnlistedParameterRejected(t *testing.T) {
	base := validParts(t)

	hidden := base
	hidden.Decoder = hidingLayer{inner: base.Decoder}
	m, err := New(hidden)
	wantErr(t, "New with a decoder hiding a parameter", err, ErrConfig, "Decoder", `"dec.0.weight"`, "Params()")
	wantErr(t, "New with a decoder hiding a parameter", err, ErrInvalidArgument)
	if m != nil {
		t.Error("New returned a model with the error")
	}

	lg, err := losses.NewLearnedGaussian("lik", 12, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	hidden = base
	hidden.Likelihood = hidingLikelihood{lg}
	_, err = New(hidden)
	wantErr(t, "New with a likelihood hiding its sigma", err, ErrConfig, "Likelihood", `"lik.log_sigma"`)

	// Bound only by the reconstruction graph: New succeeds (its graph
	// scores, it does not reconstruct); Reconstruct fails naming it, and
	// training, whose graph does not bind it, works.
	scale := &layers.Param{Name: "lik.scale", Value: tensor.New(tensor.WithShape(1, 12), tensor.Of(tensor.Float64))}
	hidden = base
	hidden.Likelihood = meanScaleLikelihood{scale: scale}
	m, err = New(hidden)
	if err != nil {
		t.Fatalf("New: %v", err)
	}
	data := binarySet(t, 4, 12, 1)
	out, err := m.Reconstruct(context.Background(), data)
	wantErr(t, "Reconstruct with a likelihood mean hiding a parameter", err, ErrConfig, "Likelihood", `"lik.scale"`)
	if out != nil {
		t.Error("Reconstruct returned a result with the error")
	}
	if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 1, BatchSize: 2}); err != nil {
		t.Errorf("Train, whose graph binds only listed parameters: %v", err)
	}
}

// TestSameNameTwoParameters: one part listing two different tensors under
// one name could not save both; the same tensor listed twice (a tied
// layer) is fine.
func TestSameNameTwoParameters(t *testing.T) {
	base := validParts(t)
	dec := base.Decoder.(*layers.MLP)
	w := dec.Params()[0]
	twin := &layers.Param{Name: w.Name, Value: w.Value.Clone().(*tensor.Dense)}
	cfg := base
	cfg.Decoder = listing{Layer: dec, extra: []*layers.Param{twin}}
	_, err := New(cfg)
	wantErr(t, "New with two tensors named dec.0.weight", err, ErrConfig, "Decoder", "dec.0.weight")
	cfg.Decoder = listing{Layer: dec, extra: []*layers.Param{w}}
	if _, err := New(cfg); err != nil {
		t.Errorf("New with a parameter listed twice by one part: %v", err)
	}
}

// listing is a layer that lists extra parameters after its own.
type listing struct {
	layers.Layer
	extra []*layers.Param
}

func (l listing) Params() []*layers.Param { return append(l.Layer.Params(), l.extra...) }
