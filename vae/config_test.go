package vae

import (
	"context"
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
	}{
		{"nil encoder", func(c *Config) { c.Encoder = nil }, []string{"Encoder"}},
		{"nil head", func(c *Config) { c.Head = nil }, []string{"Head"}},
		{"nil decoder", func(c *Config) { c.Decoder = nil }, []string{"Decoder"}},
		{"empty input shape", func(c *Config) { c.InputShape = nil }, []string{"InputShape"}},
		{"two-dimensional input shape", func(c *Config) { c.InputShape = []int{3, 4} }, []string{"InputShape"}},
		{"zero input dimension", func(c *Config) { c.InputShape = []int{0} }, []string{"InputShape"}},
		{"negative image dimension", func(c *Config) { c.InputShape = []int{1, -3, 4} }, []string{"InputShape"}},
		{"integer dtype", func(c *Config) { c.Dtype = tensor.Int }, []string{"Dtype"}},
		{"negative classes", func(c *Config) { c.Classes = -1 }, []string{"Classes"}},
		{"prior dimension mismatch", func(c *Config) { c.Prior = prior5 }, []string{"Prior", "5", "3"}},
		{"prior dtype mismatch", func(c *Config) { c.Prior = prior32 }, []string{"Prior", "prior.mean"}},
		{"encoder dtype mismatch", func(c *Config) { c.Encoder = enc32 }, []string{"Encoder", "enc.0.weight"}},
		{"duplicate parameter names", func(c *Config) { c.Decoder = dupDec }, []string{"Decoder", "enc.0.weight", "Encoder"}},
		{"head does not fit the encoder", func(c *Config) { c.Head = badHead }, []string{"head"}},
		{"decoder output too narrow", func(c *Config) { c.Decoder = narrowDec }, []string{"decoder"}},
		{"input width does not fit the encoder", func(c *Config) { c.InputShape = []int{10} }, []string{"encoder"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			cfg := base
			tc.edit(&cfg)
			m, err := New(cfg)
			wantErr(t, "New", err, ErrConfig, tc.words...)
			if m != nil {
				t.Errorf("New returned a model with the error")
			}
		})
	}
}

func TestNewMLPConfigErrors(t *testing.T) {
	cases := []struct {
		name  string
		cfg   MLPConfig
		field string
	}{
		{"zero input", MLPConfig{Input: 0, Hidden: []int{4}, Latent: 2}, "Input"},
		{"zero latent", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 0}, "Latent"},
		{"no hidden layer", MLPConfig{Input: 4, Latent: 2}, "Hidden"},
		{"zero hidden width", MLPConfig{Input: 4, Hidden: []int{0}, Latent: 2}, "Hidden"},
		{"negative classes", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 2, Classes: -2}, "Classes"},
		{"unknown activation", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 2, Activation: "swish"}, "Hidden"},
		{"integer dtype", MLPConfig{Input: 4, Hidden: []int{4}, Latent: 2, Dtype: tensor.Int}, "Hidden"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			m, err := NewMLP(tc.cfg)
			wantErr(t, "NewMLP", err, ErrConfig, tc.field)
			if m != nil {
				t.Errorf("NewMLP returned a model with the error")
			}
		})
	}
}

func TestTrainConfigErrors(t *testing.T) {
	m := smallMLP(t, 1)
	data := binarySet(t, 6, 12, 1)
	valid := binarySet(t, 3, 12, 2)
	before := paramBits(m)
	cases := []struct {
		name  string
		cfg   TrainConfig
		words []string
	}{
		{"zero epochs", TrainConfig{}, []string{"Epochs"}},
		{"negative epochs", TrainConfig{Epochs: -1}, []string{"Epochs"}},
		{"negative batch size", TrainConfig{Epochs: 1, BatchSize: -4}, []string{"BatchSize"}},
		{"negative learning rate", TrainConfig{Epochs: 1, LearnRate: -0.1}, []string{"LearnRate"}},
		{"NaN learning rate", TrainConfig{Epochs: 1, LearnRate: math.NaN()}, []string{"LearnRate"}},
		{"infinite learning rate", TrainConfig{Epochs: 1, LearnRate: math.Inf(1)}, []string{"LearnRate"}},
		{"unknown optimiser", TrainConfig{Epochs: 1, Optimizer: Optimizer(7)}, []string{"Optimizer"}},
		{"momentum one", TrainConfig{Epochs: 1, Optimizer: SGD, Momentum: 1}, []string{"Momentum"}},
		{"negative momentum", TrainConfig{Epochs: 1, Optimizer: SGD, Momentum: -0.5}, []string{"Momentum"}},
		{"negative free bits", TrainConfig{Epochs: 1, FreeBits: schedule.FreeBits{Lambda: -1}}, []string{"FreeBits"}},
		{"negative capacity gamma", TrainConfig{Epochs: 1, Capacity: schedule.Capacity{Gamma: -1, Max: 1}}, []string{"Capacity"}},
		{"negative beta", TrainConfig{Epochs: 1, Beta: schedule.Constant{Value: -1}}, []string{"Beta"}},
		{"bad warm-up", TrainConfig{Epochs: 1, Beta: schedule.LinearWarmup{Start: 0, End: math.NaN(), Steps: 3}}, []string{"Beta"}},
		{"negative clip norm", TrainConfig{Epochs: 1, ClipNorm: -1}, []string{"ClipNorm"}},
		{"patience without validation", TrainConfig{Epochs: 1, Patience: 2}, []string{"Validation"}},
		{"restore best without validation", TrainConfig{Epochs: 1, RestoreBest: true}, []string{"Validation"}},
		{"negative patience", TrainConfig{Epochs: 1, Patience: -1, Validation: valid}, []string{"Patience"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			hist, err := m.Train(context.Background(), data, tc.cfg)
			wantErr(t, "Train", err, ErrConfig, tc.words...)
			if hist != nil {
				t.Errorf("history %v with a configuration error", hist)
			}
		})
	}
	empty, err := dataset.New(nil, 0, 12)
	if err != nil {
		t.Fatal(err)
	}
	_, err = m.Train(context.Background(), empty, TrainConfig{Epochs: 1})
	wantErr(t, "Train with no records", err, ErrConfig, "data")
	_, err = m.Train(context.Background(), nil, TrainConfig{Epochs: 1})
	wantErr(t, "Train with nil data", err, layers.ErrInvalidArgument, "data")
	_, err = m.Train(context.Background(), binarySet(t, 4, 5, 1), TrainConfig{Epochs: 1})
	wantErr(t, "Train with 5 features", err, layers.ErrInvalidArgument, "features")
	_, err = m.Train(context.Background(), data, TrainConfig{Epochs: 1, Validation: binarySet(t, 4, 5, 1)})
	wantErr(t, "Train with 5-feature validation data", err, layers.ErrInvalidArgument, "validation")
	if ok, name := sameBits(m, before, paramBits(m)); !ok {
		t.Errorf("a rejected configuration changed parameter %s", name)
	}
}

func TestSetExtraReservedKey(t *testing.T) {
	m := smallMLP(t, 1)
	wantErr(t, "SetExtra empty key", m.SetExtra("", "x"), ErrConfig, "key")
	wantErr(t, "SetExtra reserved key", m.SetExtra("lowerbound.model", "x"), ErrConfig, "key")
	if err := m.SetExtra("lowerbound", "x"); err != nil {
		t.Errorf("SetExtra(%q) = %v; only the prefix with its dot is reserved", "lowerbound", err)
	}
}
