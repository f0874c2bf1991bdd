package vae

import (
	"encoding/json"
	"errors"
	"path/filepath"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/safetensors"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// Three user-written parts that describe themselves with kinds of their
// own (they wrap built-in parts, which is enough to exercise the plumbing).

type userDense struct{ d *layers.Dense }

type userDenseConfig struct {
	Name string `json:"name"`
	In   int    `json:"in"`
	Out  int    `json:"out"`
}

func (u userDense) Forward(s *layers.Scope, x *G.Node) (*G.Node, error) { return u.d.Forward(s, x) }
func (u userDense) Params() []*layers.Param                             { return u.d.Params() }
func (u userDense) Spec() layers.Spec {
	b, _ := json.Marshal(userDenseConfig{u.d.Name(), u.d.In(), u.d.Out()})
	return layers.Spec{Kind: "test.dense", Config: b}
}

type userPrior struct{ *priors.Diagonal }

func (p userPrior) Spec() layers.Spec {
	b, _ := json.Marshal(map[string]any{"name": p.Name(), "dim": p.Dim()})
	return layers.Spec{Kind: "test.diagonal", Config: b}
}

type userLikelihood struct{ losses.Gaussian }

func (l userLikelihood) Spec() layers.Spec {
	b, _ := json.Marshal(map[string]any{"sigma": l.Sigma})
	return layers.Spec{Kind: "test.gaussian", Config: b}
}

// testKinds registers the three kinds; built counts the Build calls.
func testKinds(t *testing.T, built *int) *Kinds {
	t.Helper()
	var k Kinds
	strict := func(spec layers.Spec, v any) error { return json.Unmarshal(spec.Config, v) }
	must0 := func(err error) {
		if err != nil {
			t.Fatal(err)
		}
	}
	must0(k.AddLayer("test.dense", LayerKind{
		Params: func(spec layers.Spec) ([]layers.ParamShape, error) {
			var c userDenseConfig
			if err := strict(spec, &c); err != nil {
				return nil, err
			}
			return []layers.ParamShape{{Name: c.Name + ".weight", Shape: []int{c.In, c.Out}}, {Name: c.Name + ".bias", Shape: []int{1, c.Out}}}, nil
		},
		Build: func(spec layers.Spec, opt layers.Options) (layers.Layer, error) {
			*built++
			var c userDenseConfig
			if err := strict(spec, &c); err != nil {
				return nil, err
			}
			d, err := layers.NewDense(c.Name, c.In, c.Out, opt)
			return userDense{d}, err
		},
	}))
	type priorConfig struct {
		Name string `json:"name"`
		Dim  int    `json:"dim"`
	}
	must0(k.AddPrior("test.diagonal", PriorKind{
		Params: func(spec layers.Spec) ([]layers.ParamShape, error) {
			var c priorConfig
			if err := strict(spec, &c); err != nil {
				return nil, err
			}
			return []layers.ParamShape{{Name: c.Name + ".mean", Shape: []int{1, c.Dim}}, {Name: c.Name + ".logvar", Shape: []int{1, c.Dim}}}, nil
		},
		Build: func(spec layers.Spec, dtype tensor.Dtype, _ layers.Layer, _ *layers.GaussianHead) (priors.Prior, error) {
			*built++
			var c priorConfig
			if err := strict(spec, &c); err != nil {
				return nil, err
			}
			p, err := priors.NewDiagonal(c.Name, c.Dim, dtype)
			return userPrior{p}, err
		},
	}))
	must0(k.AddLikelihood("test.gaussian", LikelihoodKind{
		Params: func(layers.Spec) ([]layers.ParamShape, error) { return nil, nil },
		Build: func(spec layers.Spec, _ tensor.Dtype) (losses.Likelihood, error) {
			*built++
			var c struct {
				Sigma float64 `json:"sigma"`
			}
			err := strict(spec, &c)
			return userLikelihood{losses.Gaussian{Sigma: c.Sigma}}, err
		},
	}))
	return &k
}

func userModel(t *testing.T, seed uint64) *Model {
	t.Helper()
	opt := f64Opt(seed)
	enc := must(layers.NewSequential("enc", userDense{must(layers.NewDense("enc.user", 12, 8, opt))}, layers.Tanh))
	prior := must(priors.NewDiagonal("prior", 3, tensor.Float64))
	copy(prior.Params()[0].Value.Data().([]float64), []float64{0.5, -0.25, 1}) // not the initial zeros
	m, err := New(Config{InputShape: []int{12}, Encoder: enc,
		Head:       must(layers.NewGaussianHead("head", 8, 3, opt)),
		Decoder:    userDense{must(layers.NewDense("dec", 3, 12, opt))},
		Likelihood: userLikelihood{losses.Gaussian{Sigma: 0.5}},
		Prior:      userPrior{prior},
		Dtype:      tensor.Float64})
	if err != nil {
		t.Fatal(err)
	}
	return m
}

// Issue 8, item 16, the full answer: user parts that describe themselves
// are saved with the description, and Load rebuilds them from the caller's
// registry (WithKinds), to the same numbers. Without the registry, Load
// says what to do.
func TestUserKindsRoundTrip(t *testing.T) {
	m := userModel(t, 1)
	path := filepath.Join(t.TempDir(), "user.safetensors")
	if err := m.Save(path); err != nil {
		t.Fatalf("Save of self-described user parts: %v", err)
	}
	_, err := Load(path)
	wantErr(t, "Load without the registry", err, ErrCheckpoint, "WithKinds", "test.dense")
	built := 0
	back, err := Load(path, WithKinds(testKinds(t, &built)))
	if err != nil {
		t.Fatalf("Load with the registry: %v", err)
	}
	if built != 4 { // two layers, the prior, the likelihood
		t.Errorf("%d Build calls, want 4", built)
	}
	if _, ok := back.Prior().(userPrior); !ok {
		t.Errorf("prior rebuilt as %T", back.Prior())
	}
	checkSameModel(t, m, back, realSet(t, 5, 12, 3))
}

// A registered kind's Params is checked against the tensors before Build
// runs: a file whose user layer claims a huge width fails without
// building anything.
func TestUserKindsCheckedBeforeBuild(t *testing.T) {
	m := userModel(t, 1)
	path := filepath.Join(t.TempDir(), "user.safetensors")
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	f := mustRead(t, path)
	meta := editDescription(t, f.Metadata, func(d map[string]any) {
		d["decoder"].(map[string]any)["config"].(map[string]any)["out"] = 1_000_000
	})
	bad := filepath.Join(t.TempDir(), "wide.safetensors")
	rewrite(t, bad, f, meta, nil)
	built := 0
	_, err := Load(bad, WithKinds(testKinds(t, &built)))
	wantErr(t, "Load of a wide user layer", err, ErrCheckpoint, "dec.weight")
	if built != 0 {
		t.Errorf("Build ran %d times before the check failed", built)
	}
}

func TestKindsAddValidates(t *testing.T) {
	var k Kinds
	ok := LayerKind{Params: func(layers.Spec) ([]layers.ParamShape, error) { return nil, nil },
		Build: func(layers.Spec, layers.Options) (layers.Layer, error) { return nil, errors.New("x") }}
	cases := map[string]error{
		"empty":          k.AddLayer("", ok),
		"built-in":       k.AddLayer("dense", ok),
		"no Build":       k.AddLayer("a", LayerKind{Params: ok.Params}),
		"prior built-in": k.AddPrior(priors.KindMixture, PriorKind{}),
		"lik built-in":   k.AddLikelihood(losses.KindBernoulli, LikelihoodKind{}),
	}
	if err := k.AddLayer("mine", ok); err != nil {
		t.Fatal(err)
	}
	cases["duplicate"] = k.AddLayer("mine", ok)
	for name, err := range cases {
		wantErr(t, name, err, layers.ErrInvalidArgument)
	}
}

func mustRead(t *testing.T, path string) *safetensors.File {
	t.Helper()
	f, err := safetensors.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return f
}
