// Command mnistbench trains an MLP VAE on MNIST binarised at pixel >= 128
// and prints each epoch's wall time and train and test negative ELBO, then
// the importance-weighted NLL estimate on the first 1000 test images. It is
// a benchmark, not an example.
//
// The default model is the one-stochastic-layer VAE of Burda, Grosse and
// Salakhutdinov, "Importance Weighted Autoencoders" (ICLR 2016, section 5):
// 784-200-200-50 with tanh, Bernoulli likelihood, Adam with learning rate
// 1e-3, batch 100, the setting of the PyTorch reference in ../shared/bench.
// The flags -hidden, -latent, -activation and -batch choose another; the
// former default, 784-400-20 with ReLU, is
//
//	go run ./internal/cmd/mnistbench -epochs 5 -hidden 400 -latent 20 -activation relu
//
// -threads sets GOMAXPROCS; the default is every core, the SDK's default
// (the PyTorch reference is fastest on one thread: compare both). -blas
// gonum runs the products on gonum's pure Go BLAS instead of the SDK's
// engine (for before/after comparisons), -blas portable on the engine with
// its portable Go kernels. Built with -tags openblas (cgo and Debian's
// libopenblas-dev) the default is OpenBLAS; set OPENBLAS_NUM_THREADS to
// match -threads when comparing.
package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"os"
	"os/signal"
	"runtime"
	"runtime/pprof"
	"strconv"
	"strings"
	"time"

	"gonum.org/v1/gonum/blas/gonum"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/gemm"
	"lowerbound.dev/internal/mnist"
	"lowerbound.dev/layers"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae"
)

type summary struct {
	Epochs      int       `json:"epochs"`
	Seed        uint64    `json:"seed"`
	Threads     int       `json:"threads"`
	Dtype       string    `json:"dtype"`
	Model       string    `json:"model"`
	Activation  string    `json:"activation"`
	Batch       int       `json:"batch"`
	Prior       string    `json:"prior"`
	BLAS        string    `json:"blas"`
	K           int       `json:"k"`
	EpochSecs   []float64 `json:"epoch_seconds"`
	TrainNegELB []float64 `json:"train_neg_elbo"`
	TestNegELBO []float64 `json:"test_neg_elbo"`
	TestNLL     float64   `json:"test_iw_nll"`
	ActiveUnits int       `json:"active_units"`
}

func main() {
	epochs := flag.Int("epochs", 1, "training epochs")
	seed := flag.Uint64("seed", 0, "seed for initialisation, shuffling and noise")
	threads := flag.Int("threads", runtime.NumCPU(), "OS threads for Go code (GOMAXPROCS); the default is every core")
	k := flag.Int("k", 100, "importance samples for the test NLL estimate")
	dtype := flag.String("dtype", "float32", "float32 or float64")
	limit := flag.Int("limit", 0, "use only the first N training and test records (0: all)")
	jsonPath := flag.String("json", "", "write a JSON summary to this file")
	savePath := flag.String("save", "", "write the trained model's checkpoint to this file")
	prior := flag.String("prior", "standard", "prior over z: standard, mixture or vamp")
	components := flag.Int("components", 50, "components of the mixture or pseudo-inputs of the VampPrior")
	cpuProfile := flag.String("cpuprofile", "", "write a CPU profile of the whole run to this file")
	var m modelFlags
	flag.StringVar(&m.hidden, "hidden", "200,200", "hidden widths of the encoder, comma-separated (the decoder mirrors them)")
	flag.IntVar(&m.latent, "latent", 50, "latent dimensions")
	flag.StringVar(&m.activation, "activation", "tanh", "activation after every hidden layer: tanh, relu, ...")
	flag.IntVar(&m.batch, "batch", 100, "records per training step")
	flag.StringVar(&m.blas, "blas", "default", "matrix library: default (the build's), gonum (gonum's pure Go) or portable (the engine's Go kernels)")
	flag.Parse()
	if *cpuProfile != "" {
		f, err := os.Create(*cpuProfile)
		if err != nil {
			fmt.Fprintln(os.Stderr, "mnistbench:", err)
			os.Exit(1)
		}
		if err := pprof.StartCPUProfile(f); err != nil {
			fmt.Fprintln(os.Stderr, "mnistbench:", err)
			os.Exit(1)
		}
		defer pprof.StopCPUProfile()
	}
	if err := run(m, *epochs, *seed, *threads, *k, *dtype, *limit, *prior, *components, *jsonPath, *savePath); err != nil {
		pprof.StopCPUProfile()
		fmt.Fprintln(os.Stderr, "mnistbench:", err)
		os.Exit(1)
	}
}

// modelFlags are the flags that choose the model, batch and BLAS.
type modelFlags struct {
	hidden     string
	latent     int
	activation string
	batch      int
	blas       string
}

// parseHidden reads "200,200" as []int{200, 200}.
func parseHidden(s string) ([]int, error) {
	var widths []int
	for _, f := range strings.Split(s, ",") {
		w, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || w < 1 {
			return nil, fmt.Errorf("-hidden %q: width %q: want a positive integer", s, f)
		}
		widths = append(widths, w)
	}
	return widths, nil
}

func run(mf modelFlags, epochs int, seed uint64, threads, k int, dtypeName string, limit int, priorName string, components int, jsonPath, savePath string) error {
	if threads < 1 {
		return fmt.Errorf("-threads %d: want >= 1", threads)
	}
	hidden, err := parseHidden(mf.hidden)
	if err != nil {
		return err
	}
	if mf.latent < 1 {
		return fmt.Errorf("-latent %d: want >= 1", mf.latent)
	}
	if mf.batch < 1 {
		return fmt.Errorf("-batch %d: want >= 1", mf.batch)
	}
	blasName := vae.BLAS
	switch mf.blas {
	case "default":
	case "gonum":
		G.Use(gonum.Implementation{})
		blasName = "gonum (pure Go)"
	case "portable":
		e, err := gemm.New(gemm.WithPortable())
		if err != nil {
			return err
		}
		G.Use(gemm.NewBLAS(e))
		blasName = "lowerbound gemm, portable Go kernels"
	default:
		return fmt.Errorf("-blas %q: want default, gonum or portable", mf.blas)
	}
	modelName := fmt.Sprintf("784-%s-%d", strings.ReplaceAll(mf.hidden, ",", "-"), mf.latent)
	runtime.GOMAXPROCS(threads)
	var dt tensor.Dtype
	switch dtypeName {
	case "float32":
		dt = tensor.Float32
	case "float64":
		dt = tensor.Float64
	default:
		return fmt.Errorf("-dtype %q: want float32 or float64", dtypeName)
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	train, test, err := mnist.Load(ctx, mnist.Options{Binarize: true, Limit: limit})
	if err != nil {
		return err
	}
	cfg := vae.MLPConfig{Input: 784, Hidden: hidden, Latent: mf.latent, Activation: layers.Activation(mf.activation), Dtype: dt, Seed: seed}
	switch priorName {
	case "standard":
	case "mixture":
		cfg.MakePrior = func(layers.Layer, *layers.GaussianHead) (priors.Prior, error) {
			return priors.NewMixture("prior", components, mf.latent, priors.MixtureOptions{Dtype: dt, Seed: seed})
		}
	case "vamp":
		cfg.MakePrior = func(enc layers.Layer, head *layers.GaussianHead) (priors.Prior, error) {
			return priors.NewVamp("prior", components, []int{784}, enc, head, priors.VampOptions{Dtype: dt, Seed: seed})
		}
	default:
		return fmt.Errorf("-prior %q: want standard, mixture or vamp", priorName)
	}
	m, err := vae.NewMLP(cfg)
	if err != nil {
		return err
	}
	fmt.Printf("lowerbound mnistbench: %s, %d thread(s), %s %s, batch %d, prior %s, BLAS %s\n", dtypeName, threads, modelName, mf.activation, mf.batch, priorName, blasName)
	trainPath := "lean training path"
	if _, why := m.LeanPaths(); why != nil {
		trainPath = "graphs (" + why.Error() + ")"
	}
	fmt.Printf("training on the %s\n", trainPath)
	sum := summary{Epochs: epochs, Seed: seed, Threads: threads, Dtype: dtypeName, K: k, Model: modelName, Activation: mf.activation, Batch: mf.batch, Prior: priorName, BLAS: blasName}
	_, err = m.Train(ctx, train, vae.TrainConfig{
		Epochs: epochs, BatchSize: mf.batch, LearnRate: 1e-3, Seed: seed,
		OnEpoch: func(e vae.EpochInfo) error {
			rep, err := m.Evaluate(ctx, test, vae.EvalOptions{K: 1, Seed: seed})
			if err != nil {
				return err
			}
			fmt.Printf("epoch %d time %.2fs train -ELBO %.2f test -ELBO %.2f\n", e.Epoch, e.Duration.Seconds(), e.Loss, rep.NegELBO)
			sum.EpochSecs = append(sum.EpochSecs, e.Duration.Seconds())
			sum.TrainNegELB = append(sum.TrainNegELB, e.Loss)
			sum.TestNegELBO = append(sum.TestNegELBO, rep.NegELBO)
			return nil
		},
	})
	if err != nil {
		return err
	}
	first := test
	if test.Len() > 1000 {
		idx := make([]int, 1000)
		for i := range idx {
			idx[i] = i
		}
		if first, err = test.Subset(idx); err != nil {
			return err
		}
	}
	t0 := time.Now()
	rep, err := m.Evaluate(ctx, first, vae.EvalOptions{K: k, Seed: seed})
	if err != nil {
		return err
	}
	sum.TestNLL, sum.ActiveUnits = rep.NLL, rep.ActiveUnits
	fmt.Printf("test NLL (IWAE k=%d, first %d test images) %.2f  [%.1fs; active units %d]\n", k, first.Len(), rep.NLL, time.Since(t0).Seconds(), rep.ActiveUnits)
	if savePath != "" {
		if err := m.Save(savePath); err != nil {
			return err
		}
	}
	if jsonPath != "" {
		b, err := json.MarshalIndent(sum, "", "  ")
		if err != nil {
			return err
		}
		if err := os.WriteFile(jsonPath, append(b, '\n'), 0o644); err != nil {
			return err
		}
	}
	return nil
}
