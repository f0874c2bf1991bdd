package priors

import (
	"encoding/json"
	"errors"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// userPrior is a Prior defined outside the package; Describe must decline it.
type userPrior struct{ *StandardNormal }

func TestSpecRoundTrip(t *testing.T) {
	opt := layers.Options{Dtype: tensor.Float64}
	enc, err := layers.NewDense("enc", 6, 4, opt)
	if err != nil {
		t.Fatal(err)
	}
	head, err := layers.NewGaussianHead("head", 4, 2, opt)
	if err != nil {
		t.Fatal(err)
	}
	std, _ := NewStandardNormal(2, tensor.Float64)
	diag, _ := NewDiagonal("prior", 2, tensor.Float64)
	mix, _ := NewMixture("prior", 5, 2, MixtureOptions{Dtype: tensor.Float64, Seed: 3})
	vamp, err := NewVamp("prior", 7, []int{1, 2, 3}, flatDense{enc}, head, VampOptions{Dtype: tensor.Float64})
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range []Prior{std, diag, mix, vamp} {
		spec, ok := Describe(p)
		if !ok {
			t.Fatalf("%T: Describe declined a built-in prior", p)
		}
		raw, err := json.Marshal(spec)
		if err != nil {
			t.Fatal(err)
		}
		var back Spec
		if err := json.Unmarshal(raw, &back); err != nil {
			t.Fatal(err)
		}
		q, err := FromSpec(back, tensor.Float64, flatDense{enc}, head)
		if err != nil {
			t.Fatalf("%s: %v", raw, err)
		}
		if q.Dim() != p.Dim() {
			t.Errorf("%s: Dim %d, want %d", raw, q.Dim(), p.Dim())
		}
		pp, qp := p.Params(), q.Params()
		if len(pp) != len(qp) {
			t.Fatalf("%s: %d params, want %d", raw, len(qp), len(pp))
		}
		for i := range pp {
			if pp[i].Name != qp[i].Name || !pp[i].Value.Shape().Eq(qp[i].Value.Shape()) || qp[i].Value.Dtype() != tensor.Float64 {
				t.Errorf("%s: param %d is %s %v, want %s %v", raw, i, qp[i].Name, qp[i].Value.Shape(), pp[i].Name, pp[i].Value.Shape())
			}
		}
	}
	if _, ok := Describe(userPrior{std}); ok {
		t.Error("Describe accepted a user prior")
	}
	if _, ok := Describe(nil); ok {
		t.Error("Describe accepted nil")
	}
}

func TestFromSpecErrors(t *testing.T) {
	if _, err := FromSpec(Spec{Kind: "flow", Dim: 2}, tensor.Float32, nil, nil); !errors.Is(err, ErrUnknownKind) {
		t.Errorf("unknown kind: error %v, want ErrUnknownKind", err)
	}
	p, err := FromSpec(Spec{Kind: KindMixture, Name: "m", Dim: 2}, tensor.Float32, nil, nil)
	if !errors.Is(err, layers.ErrInvalidArgument) || p != nil {
		t.Errorf("mixture without components: prior %v, error %v", p, err)
	}
	if _, err := FromSpec(Spec{Kind: KindVamp, Name: "v", Dim: 2, Components: 3, InputShape: []int{3}}, tensor.Float32, nil, nil); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("vamp without encoder: error %v", err)
	}
}
