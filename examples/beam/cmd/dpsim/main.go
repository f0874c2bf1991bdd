// Command dpsim measures what synchronous data-parallel training with
// parameter averaging costs in model quality, before it is built on a
// distributed engine: on binarised MNIST it trains the benchmark model
// (784-200-200-50, tanh, Bernoulli likelihood, batch 100, Adam 1e-3) once
// as a single process and once per shard count S with the in-process
// simulation of package dataparallel, and prints the test negative ELBO
// after every epoch (one sample per record, fixed seed).
//
//	go run ./cmd/dpsim -epochs 5 -shards 1,2,4,8 -json out/dpsim.json
//
// MNIST is located through the Go module proxy (lowerbound.dev/internal/mnist),
// or LOWERBOUND_MNIST_DIR.
package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"os"
	"os/signal"
	"runtime"
	"strconv"
	"strings"
	"time"

	"lowerbound.dev/examples/beam/dataparallel"
	"lowerbound.dev/internal/mnist"
	"lowerbound.dev/layers"
	"lowerbound.dev/vae"
)

// Series is the test negative ELBO after each epoch of one configuration.
type Series struct {
	Name      string    `json:"name"`
	Shards    int       `json:"shards"` // 0: single-process baseline
	TestELBO  []float64 `json:"test_neg_elbo"`
	EpochSecs []float64 `json:"epoch_seconds"`
}

func main() {
	epochs := flag.Int("epochs", 5, "epochs (= averaging rounds)")
	shardList := flag.String("shards", "1,2,4,8", "comma-separated shard counts S")
	seed := flag.Uint64("seed", 1, "seed of the weights, sharding, shuffling and noise")
	hidden := flag.String("hidden", "200,200", "hidden widths")
	latent := flag.Int("latent", 50, "latent dimensions")
	act := flag.String("activation", "tanh", "hidden activation (tanh, relu, ...)")
	limit := flag.Int("limit", 0, "use only the first N training and test records (0: all)")
	threads := flag.Int("threads", 1, "GOMAXPROCS")
	jsonPath := flag.String("json", "", "write the table as JSON to this file")
	flag.Parse()
	if err := run(*epochs, *shardList, *seed, *hidden, *latent, layers.Activation(*act), *limit, *threads, *jsonPath); err != nil {
		fmt.Fprintln(os.Stderr, "dpsim:", err)
		os.Exit(1)
	}
}

func run(epochs int, shardList string, seed uint64, hiddenList string, latent int, act layers.Activation, limit, threads int, jsonPath string) error {
	if epochs < 1 {
		return fmt.Errorf("-epochs %d: want >= 1", epochs)
	}
	var shards []int
	for _, f := range strings.Split(shardList, ",") {
		s, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || s < 1 {
			return fmt.Errorf("-shards %q: want positive integers", shardList)
		}
		shards = append(shards, s)
	}
	var hidden []int
	for _, f := range strings.Split(hiddenList, ",") {
		h, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || h < 1 {
			return fmt.Errorf("-hidden %q: want positive integers", hiddenList)
		}
		hidden = append(hidden, h)
	}
	runtime.GOMAXPROCS(threads)
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	train, test, err := mnist.Load(ctx, mnist.Options{Binarize: true, Limit: limit})
	if err != nil {
		return err
	}
	newModel := func() (*vae.Model, error) {
		return vae.NewMLP(vae.MLPConfig{Input: 784, Hidden: hidden, Latent: latent, Activation: act, Seed: seed})
	}
	eval := func(m *vae.Model) (float64, error) {
		rep, err := m.Evaluate(ctx, test, vae.EvalOptions{K: 1, Seed: seed})
		return rep.NegELBO, err
	}
	fmt.Printf("dpsim: MNIST binarised, train %d, test %d; model 784-%s-%d %s, Bernoulli, batch 100, Adam 1e-3; %d epochs; GOMAXPROCS %d\n",
		train.Len(), test.Len(), hiddenList, latent, act, epochs, threads)
	var table []Series

	// Single process: one Train call, Adam state carried across epochs.
	m, err := newModel()
	if err != nil {
		return err
	}
	base := Series{Name: "single process"}
	t0 := time.Now()
	_, err = m.Train(ctx, train, vae.TrainConfig{Epochs: epochs, BatchSize: 100, LearnRate: 1e-3, Seed: seed,
		OnEpoch: func(e vae.EpochInfo) error {
			v, err := eval(m)
			base.TestELBO = append(base.TestELBO, v)
			base.EpochSecs = append(base.EpochSecs, time.Since(t0).Seconds())
			t0 = time.Now()
			fmt.Printf("%-16s epoch %d  test -ELBO %8.3f  (%.0fs)\n", base.Name, e.Epoch, v, base.EpochSecs[len(base.EpochSecs)-1])
			return err
		}})
	if err != nil {
		return err
	}
	table = append(table, base)

	for _, s := range shards {
		m, err := newModel()
		if err != nil {
			return err
		}
		ser := Series{Name: fmt.Sprintf("S=%d averaged", s), Shards: s}
		t0 := time.Now()
		err = dataparallel.Run(ctx, m, train, dataparallel.Config{Shards: s, Rounds: epochs, Batch: 100, LearnRate: 1e-3, Seed: seed,
			OnRound: func(r int) error {
				v, err := eval(m)
				ser.TestELBO = append(ser.TestELBO, v)
				ser.EpochSecs = append(ser.EpochSecs, time.Since(t0).Seconds())
				t0 = time.Now()
				fmt.Printf("%-16s epoch %d  test -ELBO %8.3f  (%.0fs)\n", ser.Name, r, v, ser.EpochSecs[len(ser.EpochSecs)-1])
				return err
			}})
		if err != nil {
			return err
		}
		table = append(table, ser)
	}

	fmt.Printf("\ntest -ELBO (nats) after each epoch\n%-16s", "")
	for e := 1; e <= epochs; e++ {
		fmt.Printf(" %8s", fmt.Sprintf("epoch %d", e))
	}
	fmt.Println()
	for _, s := range table {
		fmt.Printf("%-16s", s.Name)
		for _, v := range s.TestELBO {
			fmt.Printf(" %8.2f", v)
		}
		fmt.Println()
	}
	if jsonPath != "" {
		b, err := json.MarshalIndent(table, "", "  ")
		if err != nil {
			return err
		}
		return os.WriteFile(jsonPath, append(b, '\n'), 0o644)
	}
	return nil
}
