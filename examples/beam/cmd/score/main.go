// Command score runs the Beam scoring pipeline: it reads CSV records from
// the files matching -input, scores them with the checkpoint -model and
// writes sharded scores and flags (and, with -embed, encoder means) and the
// dead letters under -out. It runs on prism, in this process, unless
// --runner says otherwise (see the module's README).
//
//	go run ./cmd/score -input 'data/*.csv' -model out/beam/model.safetensors -out out/beam/run
//
// Without -input and -model it first writes an invented demo data set and
// trains a demo model on a sample of it (as cmd/train does), so that one
// command runs end to end from a clean checkout:
//
//	go run ./cmd/score
package main

import (
	"context"
	"flag"
	"fmt"
	"math"
	"os"
	"os/signal"
	"path/filepath"
	"strconv"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"

	"lowerbound.dev/examples/beam/cmd/internal/jobs"
	"lowerbound.dev/examples/beam/pipeline"
	"lowerbound.dev/examples/beam/tabular"
)

func main() {
	var cfg pipeline.Config
	flag.StringVar(&cfg.Input, "input", "", "glob of the CSV files to score (empty with -model empty: the demo)")
	flag.StringVar(&cfg.Model, "model", "", "checkpoint (local path, gs://...)")
	flag.StringVar(&cfg.Out, "out", "out/beam/run", "output folder (local path, gs://...)")
	flag.StringVar(&cfg.Prefix, "meta-prefix", tabular.DefaultPrefix, "checkpoint metadata prefix of the column names, standardisation and threshold")
	flag.StringVar(&cfg.IDColumn, "id-column", "", "id column keying the records (default: file base name and line number)")
	flag.IntVar(&cfg.Score.K, "k", 1, "importance samples per score (1: one-sample negative ELBO)")
	flag.Uint64Var(&cfg.Score.Seed, "seed", 1, "seed of the scoring noise (with each record's key)")
	flag.BoolVar(&cfg.Score.AtPosteriorMean, "at-mean", false, "deterministic score at the posterior mean (needs -k 1)")
	threshold := flag.String("threshold", "", "alarm threshold in nats (default: the checkpoint's)")
	flag.BoolVar(&cfg.Embed, "embed", false, "also write the encoder means")
	flag.IntVar(&cfg.Batch, "batch", 1024, "records per Score call")
	flag.IntVar(&cfg.Shards, "shards", 4, "output shards")
	demoRecords := flag.Int("demo-records", 100000, "records of the demo data set")
	demoFiles := flag.Int("demo-files", 8, "files of the demo data set")
	demoDir := flag.String("demo-dir", "out/beam/demo", "folder of the demo data set and model")
	flag.Parse()
	beam.Init()
	cfg.Threshold = math.NaN()
	if *threshold != "" {
		t, err := strconv.ParseFloat(*threshold, 64)
		if err != nil || math.IsNaN(t) {
			fmt.Fprintf(os.Stderr, "score: -threshold %q: not a number\n", *threshold)
			os.Exit(2)
		}
		cfg.Threshold = t
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	if err := run(ctx, cfg, *demoRecords, *demoFiles, *demoDir); err != nil {
		fmt.Fprintln(os.Stderr, "score:", err)
		os.Exit(1)
	}
}

func run(ctx context.Context, cfg pipeline.Config, demoRecords, demoFiles int, demoDir string) error {
	switch {
	case cfg.Input == "" && cfg.Model == "":
		glob, err := jobs.Demo(filepath.Join(demoDir, "data"), demoRecords, demoFiles, 3, 1, os.Stdout)
		if err != nil {
			return err
		}
		cfg.Input, cfg.Model = glob, filepath.Join(demoDir, "model.safetensors")
		tc := tabular.TrainConfig{Epochs: 20, Seed: 1, Score: cfg.Score}
		job := jobs.TrainJob{Input: glob, Columns: tabular.DemoColumns(), Sample: min(20000, demoRecords), Seed: 1, Model: cfg.Model,
			Work: filepath.Join(demoDir, "train"), Train: tc}
		if err := jobs.Train(ctx, job, os.Stdout); err != nil {
			return err
		}
	case cfg.Input == "" || cfg.Model == "":
		return fmt.Errorf("-input %q and -model %q: give both, or neither for the demo", cfg.Input, cfg.Model)
	}
	_, err := jobs.Score(ctx, cfg, os.Stdout)
	if err == nil && strings.HasPrefix(cfg.Out, "out/") {
		fmt.Println("see", filepath.Join(cfg.Out, "scores-*.csv"), "and", filepath.Join(cfg.Out, "dead_letters-*.csv"))
	}
	return err
}
