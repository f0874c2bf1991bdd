package vae

import (
	"context"
	"errors"
	"io/fs"
	"math"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
	"lowerbound.dev/vae/schedule"
)

// validParts returns the parts of a small valid float64 model (12 inputs,
// 8 features, 3 latent dimensions) for the config tests to break one at a
// time.
func validParts(t *testing.T) Config {
	t.Helper()
	enc := must(layers.NewMLP("enc", layers.MLPConfig{Sizes: []int{12, 8}, Output: layers.ReLU}, f64Opt(1)))
	head := must(layers.NewGaussianHead("head", 8, 3, f64Opt(1)))
	dec := must(layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{3, 8, 12}}, f64Opt(1)))
	return Config{InputShape: []int{12}, Encoder: enc, Head: head, Decoder: dec, Dtype: tensor.Float64}
}

func TestNewConfigErrors(t *testing.T) {
	base := validParts(t)
	if _, err := New(base); err != nil {
		t.Fatalf("the valid base config fails: %v", err)
	}
	prior5, err := priors.NewStandardNormal(5, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	prior32, err := priors.NewDiagonal("prior", 3, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	enc32 := must(layers.NewMLP("enc", layers.MLPConfig{Sizes: []int{12, 8}}, layers.Options{Dtype: tensor.Float32}))
	// A decoder that reuses the encoder's name, so both own "enc.0.weight".
	dupDec := must(layers.NewMLP("enc", layers.MLPConfig{Sizes: []int{3, 8, 12}}, f64Opt(2)))
	badHead := must(layers.NewGaussianHead("head", 5, 3, f64Opt(1)))
	narrowDec := must(layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{3, 8, 10}}, f64Opt(1)))

	cases := []struct {
		name  string
		edit  func(c *Config)
		words []string
		cause bool // the error wraps a layers error beside ErrConfig
	}{
		{"nil encoder", func(c *Config) { c.Encoder = nil }, []string{"Encoder"}, false},
		{"nil head", func(c *Config) { c.Head = nil }, []string{"Head"}, false},
		{"nil decoder", func(c *Config) { c.Decoder = nil }, []string{"Decoder"}, false},
		{"empty input shape", func(c *Config) { c.InputShape = nil }, []string{"InputShape"}, false},
		{"two-dimensional input shape", func(c *Config) { c.InputShape = []int{3, 4} }, []string{"InputShape"}, false},
		{"zero input dimension", func(c *Config) { c.InputShape = []int{0} }, []string{"InputShape"}, false},
		{"negative image dimension", func(c *Config) { c.InputShape = []int{1, -3, 4} }, []string{"InputShape"}, false},
		{"integer dtype", func(c *Config) { c.Dtype = tensor.Int }, []string{"Dtype"}, false},
		{"negative classes", func(c *Config) { c.Classes = -1 }, []string{"Classes"}, false},
		{"prior dimension mismatch", func(c *Config) { c.Prior = prior5 }, []string{"Prior", "5", "3"}, false},
		{"prior dtype mismatch", func(c *Config) { c.Prior = prior32 }, []string{"Prior", "prior.mean"}, false},
		{"encoder dtype mismatch", func(c *Config) { c.Encoder = enc32 }, []string{"Encoder", "enc.0.weight"}, false},
		{"duplicate parameter names", func(c *Config) { c.Decoder = dupDec }, []string{"Decoder", "enc.0.weight", "Encoder"}, false},
		{"head does not fit the encoder", func(c *Config) { c.Head = badHead }, []string{"head"}, true},
		{"decoder output too narrow", func(c *Config) { c.Decoder = narrowDec }, []string{"decoder"}, false},
		{"input width does not fit the encoder", func(c *Config) { c.InputShape = []int{10} }, []string{"encoder"}, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			cfg := base
			tc.edit(&cfg)
			m, err := New(cfg)
			wantErr(t, "New", err, ErrConfig, tc.words...)
			wantErr(t, "New", err, ErrInvalidArgument)
			if tc.cause && !reachesSkipping(err, ErrInvalidArgument, ErrConfig) {
				t.Errorf("New: error %q lost the chain of its cause (formatted with %%v, not %%w)", err)
			}
			if m != nil {
				t.Errorf("New returned a model with the error")
			}
		})
	}
}

func TestNewMLPConfigErrors(t *testing.T) {
	errPrior := errors.New("test: no prior today")
	failingPrior := func(layers.Layer, *layers.GaussianHead) (priors.Prior, error) { return nil, errPrior }
	cases := []struct {
		name  string
		cfg   MLPConfig
		field string
		cause error // the error also wraps this, beside ErrConfig; nil: nothing
	}{
		{"zero input", MLPConfig{Input: 0, Hidden: []int{4}, Latent: 2}, "Input", nil},
		{"zero latent", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 0}, "Latent", nil},
		{"no hidden layer", MLPConfig{Input: 4, Latent: 2}, "Hidden", nil},
		{"zero hidden width", MLPConfig{Input: 4, Hidden: []int{0}, Latent: 2}, "Hidden", ErrInvalidArgument},
		{"negative classes", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 2, Classes: -2}, "Classes", nil},
		{"unknown activation", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 2, Activation: "swish"}, "Hidden", ErrInvalidArgument},
		{"integer dtype", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 2, Dtype: tensor.Int}, "Hidden", ErrInvalidArgument},
		{"failing MakePrior", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 2, MakePrior: failingPrior}, "MakePrior", errPrior},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			m, err := NewMLP(tc.cfg)
			wantErr(t, "NewMLP", err, ErrConfig, tc.field)
			wantErr(t, "NewMLP", err, ErrInvalidArgument)
			if tc.cause != nil && !reachesSkipping(err, tc.cause, ErrConfig) {
				t.Errorf("NewMLP: error %q lost the chain of its cause (formatted with %%v, not %%w)", err)
			}
			if m != nil {
				t.Errorf("NewMLP returned a model with the error")
			}
		})
	}
}

// failingBeta is a user schedule whose Validate fails with its own error.
type failingBeta struct{ err error }

func (failingBeta) At(int) float64    { return 1 }
func (b failingBeta) Validate() error { return b.err }

// TestTrainConfigErrors names every TrainConfig field that has invalid
// values: each is rejected before any training step (the parameters stay
// as they were), with an error naming the field that wraps ErrConfig and
// ErrInvalidArgument and, where the field's own validation failed, the
// chain of that error.
func TestTrainConfigErrors(t *testing.T) {
	m := smallMLP(t, 1)
	data := binarySet(t, 6, 12, 1)
	valid := binarySet(t, 3, 12, 2)
	noRecords, err := dataset.New(nil, 0, 12)
	if err != nil {
		t.Fatal(err)
	}
	errBeta := errors.New("test: bad schedule")
	dir := t.TempDir()
	before := paramBits(m)
	cases := []struct {
		name  string
		cfg   TrainConfig
		words []string
		cause error // also wrapped beside ErrConfig; nil: nothing
	}{
		{"zero epochs", TrainConfig{}, []string{"Epochs"}, nil},
		{"negative epochs", TrainConfig{Epochs: -1}, []string{"Epochs"}, nil},
		{"negative batch size", TrainConfig{Epochs: 1, BatchSize: -4}, []string{"BatchSize"}, nil},
		{"negative learning rate", TrainConfig{Epochs: 1, LearnRate: -0.1}, []string{"LearnRate"}, nil},
		{"NaN learning rate", TrainConfig{Epochs: 1, LearnRate: math.NaN()}, []string{"LearnRate"}, nil},
		{"infinite learning rate", TrainConfig{Epochs: 1, LearnRate: math.Inf(1)}, []string{"LearnRate"}, nil},
		{"unknown optimiser", TrainConfig{Epochs: 1, Optimizer: Optimizer(7)}, []string{"Optimizer"}, nil},
		{"momentum one", TrainConfig{Epochs: 1, Optimizer: SGD, Momentum: 1}, []string{"Momentum"}, nil},
		{"negative momentum", TrainConfig{Epochs: 1, Optimizer: SGD, Momentum: -0.5}, []string{"Momentum"}, nil},
		{"NaN momentum", TrainConfig{Epochs: 1, Optimizer: SGD, Momentum: math.NaN()}, []string{"Momentum", "NaN"}, nil},
		{"momentum with Adam", TrainConfig{Epochs: 1, Optimizer: Adam, Momentum: 0.9}, []string{"Momentum", "SGD"}, nil},
		{"negative free bits", TrainConfig{Epochs: 1, FreeBits: schedule.FreeBits{Lambda: -1}}, []string{"FreeBits", "Lambda"}, ErrInvalidArgument},
		{"NaN free bits", TrainConfig{Epochs: 1, FreeBits: schedule.FreeBits{Lambda: math.NaN()}}, []string{"FreeBits", "Lambda"}, ErrInvalidArgument},
		{"negative capacity gamma", TrainConfig{Epochs: 1, Capacity: schedule.Capacity{Gamma: -1, Max: 1}}, []string{"Capacity", "Gamma"}, ErrInvalidArgument},
		{"NaN capacity max", TrainConfig{Epochs: 1, Capacity: schedule.Capacity{Gamma: 1, Max: math.NaN()}}, []string{"Capacity", "Max"}, ErrInvalidArgument},
		{"negative beta", TrainConfig{Epochs: 1, Beta: schedule.Constant{Value: -1}}, []string{"Beta"}, ErrInvalidArgument},
		{"bad warm-up", TrainConfig{Epochs: 1, Beta: schedule.LinearWarmup{Start: 0, End: math.NaN(), Steps: 3}}, []string{"Beta"}, ErrInvalidArgument},
		{"user beta that fails its own Validate", TrainConfig{Epochs: 1, Beta: failingBeta{errBeta}}, []string{"Beta", "bad schedule"}, errBeta},
		{"user beta negative at step 0", TrainConfig{Epochs: 1, Beta: constBeta(-1)}, []string{"Beta", "At(0)"}, nil},
		{"user beta infinite at step 0", TrainConfig{Epochs: 1, Beta: constBeta(math.Inf(1))}, []string{"Beta", "At(0)"}, nil},
		{"negative clip norm", TrainConfig{Epochs: 1, ClipNorm: -1}, []string{"ClipNorm"}, nil},
		{"NaN clip norm", TrainConfig{Epochs: 1, ClipNorm: math.NaN()}, []string{"ClipNorm", "NaN"}, nil},
		{"infinite clip norm", TrainConfig{Epochs: 1, ClipNorm: math.Inf(1)}, []string{"ClipNorm"}, nil},
		{"patience without validation", TrainConfig{Epochs: 1, Patience: 2}, []string{"Validation"}, nil},
		{"restore best without validation", TrainConfig{Epochs: 1, RestoreBest: true}, []string{"Validation"}, nil},
		{"empty validation set", TrainConfig{Epochs: 1, Validation: noRecords}, []string{"Validation", "no records"}, nil},
		{"negative patience", TrainConfig{Epochs: 1, Patience: -1, Validation: valid}, []string{"Patience"}, nil},
		{"checkpoint in a missing directory", TrainConfig{Epochs: 1, CheckpointPath: dir + "/missing/m.safetensors"}, []string{"CheckpointPath", "missing"}, fs.ErrNotExist},
		{"checkpoint path is a directory", TrainConfig{Epochs: 1, CheckpointPath: dir}, []string{"CheckpointPath", "directory"}, nil},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			steps := 0
			tc.cfg.OnStep = func(StepInfo) { steps++ }
			hist, err := m.Train(context.Background(), data, tc.cfg)
			wantErr(t, "Train", err, ErrConfig, tc.words...)
			wantErr(t, "Train", err, ErrInvalidArgument)
			if tc.cause != nil && !reachesSkipping(err, tc.cause, ErrConfig) {
				t.Errorf("Train: error %q lost the chain of its cause (formatted with %%v, not %%w)", err)
			}
			if hist != nil || steps != 0 {
				t.Errorf("history %v and %d steps with a configuration error; want it rejected up front", hist, steps)
			}
		})
	}
	_, err = m.Train(context.Background(), noRecords, TrainConfig{Epochs: 1})
	wantErr(t, "Train with no records", err, ErrConfig, "data")
	_, err = m.Train(context.Background(), nil, TrainConfig{Epochs: 1})
	wantErr(t, "Train with nil data", err, ErrInvalidArgument, "data")
	_, err = m.Train(context.Background(), binarySet(t, 4, 5, 1), TrainConfig{Epochs: 1})
	wantErr(t, "Train with 5 features", err, ErrInvalidArgument, "features")
	_, err = m.Train(context.Background(), data, TrainConfig{Epochs: 1, Validation: binarySet(t, 4, 5, 1)})
	wantErr(t, "Train with 5-feature validation data", err, ErrInvalidArgument, "validation")
	if ok, name := sameBits(m, before, paramBits(m)); !ok {
		t.Errorf("a rejected configuration changed parameter %s", name)
	}
}

// reachesSkipping reports whether err's chain (errors.Unwrap, single and
// multiple) reaches target along a path that does not pass through skip:
// true when the error keeps its cause's chain, not only the sentinel
// added on top of it.
func reachesSkipping(err, target, skip error) bool {
	if err == nil || err == skip {
		return false
	}
	if err == target {
		return true
	}
	if x, ok := err.(interface{ Is(error) bool }); ok && x.Is(target) {
		return true
	}
	switch u := err.(type) {
	case interface{ Unwrap() error }:
		return reachesSkipping(u.Unwrap(), target, skip)
	case interface{ Unwrap() []error }:
		for _, e := range u.Unwrap() {
			if reachesSkipping(e, target, skip) {
				return true
			}
		}
	}
	return false
}

func TestSetExtraReservedKey(t *testing.T) {
	m := smallMLP(t, 1)
	wantErr(t, "SetExtra empty key", m.SetExtra("", "x"), ErrConfig, "key")
	wantErr(t, "SetExtra reserved key", m.SetExtra("lowerbound.model", "x"), ErrConfig, "key")
	if err := m.SetExtra("lowerbound", "x"); err != nil {
		t.Errorf("SetExtra(%q) = %v; only the prefix with its dot is reserved", "lowerbound", err)
	}
}
