// Command train draws a uniform sample of fixed size from CSV files with
// an Apache Beam pipeline (prism by default; see the module's README for
// other runners), trains a VAE on the sample in this process and writes
// the checkpoint the scoring pipeline (cmd/score) reads.
//
//	go run ./cmd/train -input 'data/*.csv' -sample 20000 -model out/model.safetensors
package main

import (
	"context"
	"flag"
	"fmt"
	"os"
	"os/signal"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"

	"lowerbound.dev/examples/beam/cmd/internal/jobs"
	"lowerbound.dev/examples/beam/tabular"
)

func main() {
	var cfg jobs.TrainJob
	flag.StringVar(&cfg.Input, "input", "", "glob of the CSV files to sample (required)")
	columns := flag.String("columns", strings.Join(tabular.DemoColumns(), ","), "comma-separated feature columns")
	flag.StringVar(&cfg.IDColumn, "id-column", "", "id column keying the records (default: file base name and line number)")
	flag.IntVar(&cfg.Sample, "sample", 20000, "sample size")
	flag.Uint64Var(&cfg.Seed, "seed", 1, "seed of the sample, the weights and the training")
	flag.StringVar(&cfg.Model, "model", "out/beam/model.safetensors", "checkpoint to write (local path)")
	flag.StringVar(&cfg.Work, "work", "out/beam/train", "folder for the sample file and the dead letters")
	flag.IntVar(&cfg.Train.Epochs, "epochs", 20, "training epochs")
	flag.IntVar(&cfg.Train.Score.K, "k", 1, "importance samples of the scores the threshold is computed from (score with the same -k)")
	flag.Float64Var(&cfg.Train.Alpha, "alpha", 0.01, "false-alarm rate of the alarm threshold (split conformal, vae/alarm, on a held-out part of the sample)")
	flag.Parse()
	beam.Init()
	cfg.Columns = strings.Split(*columns, ",")
	cfg.Train.Seed, cfg.Train.Score.Seed = cfg.Seed, cfg.Seed
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	if cfg.Input == "" {
		fmt.Fprintln(os.Stderr, "train: -input is required")
		os.Exit(2)
	}
	if err := jobs.Train(ctx, cfg, os.Stdout); err != nil {
		fmt.Fprintln(os.Stderr, "train:", err)
		os.Exit(1)
	}
}
