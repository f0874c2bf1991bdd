// Command customprior trains the same telemetry VAE twice, once with the
// SDK's standard normal prior and once with a prior written outside the SDK
// (Laplace, in laplace.go, with a learnable scale per latent dimension), and
// compares them on held-out normal operation and on injected faults.
//
// The telemetry is invented: a simulated fleet of pumping stations (see
// examples/internal/fleet). The scores are a screening aid, not a protection
// system: alarms, trips and inspections follow the site's own procedures and
// qualified staff.
//
// The Laplace prior implements priors.Prior and nothing more. The trainer
// sees that it has no closed-form KL and uses the Monte Carlo estimate
// log q(z|x) - log p(z); the prior's learnable scales are trained and saved
// with the model like any other parameter. Because the prior is not one of
// the SDK's own, the checkpoint carries the weights but not a description
// the SDK could rebuild it from: the program reloads it with LoadWeights
// into a model built by the same code, and checks the scores match.
package main

import (
	"context"
	"encoding/csv"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"path/filepath"
	"strconv"
	"text/tabwriter"
	"time"

	"gorgonia.org/tensor"

	"lowerbound.dev/examples/internal/detect"
	"lowerbound.dev/examples/internal/fleet"
	"lowerbound.dev/examples/internal/progress"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/dataset"
)

// Disclaimer is printed with every report.
const Disclaimer = "The scores are a screening aid, not a protection system: alarms, trips and inspections follow the site's own procedures and qualified staff."

// config holds the command's flags.
type config struct {
	Out         string
	Seed        uint64
	Epochs      int
	Stations    int
	HistoryDays int
	ValDays     int
	TestDays    int
	K           int
	Latent      int
	Log         io.Writer // report; nil discards
	Progress    io.Writer // bar or epoch lines; nil means Log
}

func defaultConfig() config {
	return config{Out: filepath.Join("out", "customprior"), Seed: 1, Epochs: 30, Stations: 6,
		HistoryDays: 21, ValDays: 4, TestDays: 7, K: 16, Latent: 4}
}

// outcome is one model's results.
type outcome struct {
	Prior      string
	Validation vae.Report // on held-out normal records, with K samples
	AUC        map[fleet.Fault]float64
	AUCAll     float64
	TrainTime  time.Duration
	Checkpoint string
	// ReloadMaxDiff is the largest difference between the test scores of
	// the trained model and of the model reloaded from its checkpoint.
	ReloadMaxDiff float64
	Scales        []float64 // the Laplace prior's learned scales
}

func main() {
	cfg := defaultConfig()
	fs := flag.NewFlagSet("customprior", flag.ContinueOnError)
	fs.Usage = func() {
		fmt.Fprintf(fs.Output(), `customprior compares the SDK's standard normal prior with a Laplace prior
written outside the SDK, on invented pump-station telemetry. It trains the
same model with each prior, reports the held-out negative ELBO and
importance-weighted NLL on normal operation and the ROC AUC of the anomaly
score per injected fault type, and writes both checkpoints to -out.

%s

Flags:
`, Disclaimer)
		fs.PrintDefaults()
	}
	fs.StringVar(&cfg.Out, "out", cfg.Out, "output folder for the checkpoints and comparison.csv")
	fs.Uint64Var(&cfg.Seed, "seed", cfg.Seed, "seed of the data, the weights, shuffling and scoring noise")
	fs.IntVar(&cfg.Epochs, "epochs", cfg.Epochs, "training epochs per model")
	fs.IntVar(&cfg.Stations, "stations", cfg.Stations, "pumping stations in the invented fleet")
	fs.IntVar(&cfg.HistoryDays, "days", cfg.HistoryDays, "days of normal operation (the last -val-days are held out)")
	fs.IntVar(&cfg.ValDays, "val-days", cfg.ValDays, "held-out days of normal operation")
	fs.IntVar(&cfg.TestDays, "test-days", cfg.TestDays, "days of the test period, with injected faults")
	fs.IntVar(&cfg.K, "k", cfg.K, "importance samples per score")
	fs.IntVar(&cfg.Latent, "latent", cfg.Latent, "latent dimensions")
	if err := fs.Parse(os.Args[1:]); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return
		}
		os.Exit(2)
	}
	cfg.Log, cfg.Progress = os.Stdout, os.Stderr
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	res, err := run(ctx, cfg)
	if err != nil {
		fmt.Fprintln(os.Stderr, "customprior:", err)
		os.Exit(1)
	}
	printComparison(os.Stdout, res)
}

func (c config) validate() error {
	if err := fleet.CheckFlags(c.Stations, c.HistoryDays, c.ValDays, c.TestDays); err != nil {
		return err
	}
	switch {
	case c.Out == "":
		return errors.New("-out: empty")
	case c.Epochs < 1:
		return fmt.Errorf("-epochs %d: want >= 1", c.Epochs)
	case c.K < 2:
		return fmt.Errorf("-k %d: want >= 2", c.K)
	case c.Latent < 1:
		return fmt.Errorf("-latent %d: want >= 1", c.Latent)
	}
	return nil
}

// run generates the data, trains and evaluates one model per prior and
// writes the checkpoints and comparison.csv.
func run(ctx context.Context, cfg config) ([]outcome, error) {
	if err := cfg.validate(); err != nil {
		return nil, err
	}
	if cfg.Log == nil {
		cfg.Log = io.Discard
	}
	if cfg.Progress == nil {
		cfg.Progress = cfg.Log
	}
	if err := os.MkdirAll(cfg.Out, 0o755); err != nil {
		return nil, err
	}
	d, err := makeData(cfg)
	if err != nil {
		return nil, err
	}
	fmt.Fprintf(cfg.Log, "invented fleet: %d stations; train %d records, validation %d, test %d (%d faulty)\n",
		cfg.Stations, d.train.Len(), d.val.Len(), d.test.Len(), d.faulty)
	var out []outcome
	for _, name := range []string{"standard normal", "laplace (custom)"} {
		o, err := trainOne(ctx, cfg, d, name)
		if err != nil {
			return out, fmt.Errorf("%s prior: %w", name, err)
		}
		out = append(out, o)
	}
	return out, writeComparison(filepath.Join(cfg.Out, "comparison.csv"), out)
}

// data is the standardised telemetry, split in time.
type data struct {
	train, val, test *dataset.Set
	testFaults       []fleet.Fault
	faulty           int
}

func makeData(cfg config) (*data, error) {
	f, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: cfg.Stations, HistoryDays: cfg.HistoryDays,
		TestDays: cfg.TestDays, Seed: cfg.Seed})
	if err != nil {
		return nil, err
	}
	valFrom := fleet.Start().AddDate(0, 0, cfg.HistoryDays-cfg.ValDays)
	trainRaw, valRaw, testRaw, err := f.Sets(valFrom)
	if err != nil {
		return nil, err
	}
	d := &data{}
	z, err := dataset.FitStandardizer(trainRaw)
	if err != nil {
		return nil, err
	}
	if d.train, err = z.Apply(trainRaw); err != nil {
		return nil, err
	}
	if d.val, err = z.Apply(valRaw); err != nil {
		return nil, err
	}
	if d.test, err = z.Apply(testRaw); err != nil {
		return nil, err
	}
	for _, r := range f.Test {
		d.testFaults = append(d.testFaults, r.Fault)
		if r.Fault != fleet.Normal {
			d.faulty++
		}
	}
	return d, nil
}

// buildModel returns the model for one prior: the same architecture, seed
// and likelihood for both, conditioned on the station type.
func buildModel(cfg config, priorName string) (*vae.Model, *Laplace, error) {
	lik, err := losses.NewLearnedGaussian("likelihood", fleet.NumSensors, tensor.Float32)
	if err != nil {
		return nil, nil, err
	}
	mc := vae.MLPConfig{Input: fleet.NumSensors, Hidden: []int{64, 32}, Latent: cfg.Latent,
		Classes: len(fleet.StationTypes()), Likelihood: lik, Seed: cfg.Seed}
	var lap *Laplace
	if priorName != "standard normal" {
		if lap, err = NewLaplace("prior", cfg.Latent, tensor.Float32); err != nil {
			return nil, nil, err
		}
		mc.MakePrior = func(layers.Layer, *layers.GaussianHead) (priors.Prior, error) { return lap, nil }
	}
	m, err := vae.NewMLP(mc)
	return m, lap, err
}

func trainOne(ctx context.Context, cfg config, d *data, priorName string) (outcome, error) {
	o := outcome{Prior: priorName, AUC: map[fleet.Fault]float64{}}
	m, lap, err := buildModel(cfg, priorName)
	if err != nil {
		return o, err
	}
	const batch = 128
	rep := progress.New(progress.Options{Out: cfg.Progress, Label: priorName, Epochs: cfg.Epochs,
		StepsPerEpoch: progress.Steps(d.train.Len(), batch)})
	_, err = m.Train(ctx, d.train, vae.TrainConfig{Epochs: cfg.Epochs, BatchSize: batch, LearnRate: 2e-3, Seed: cfg.Seed,
		Validation: d.val, RestoreBest: true, OnStep: rep.OnStep, OnEpoch: rep.OnEpoch})
	o.TrainTime = rep.Done()
	if err != nil {
		return o, err
	}
	if o.Validation, err = m.Evaluate(ctx, d.val, vae.EvalOptions{K: cfg.K, Seed: cfg.Seed}); err != nil {
		return o, err
	}
	scores, err := m.Score(ctx, d.test, vae.ScoreOptions{K: cfg.K, Seed: cfg.Seed})
	if err != nil {
		return o, err
	}
	var normal, faulty []float64
	byFault := map[fleet.Fault][]float64{}
	for i, s := range scores {
		f := d.testFaults[i]
		if f == fleet.Normal {
			normal = append(normal, s)
			continue
		}
		faulty = append(faulty, s)
		byFault[f] = append(byFault[f], s)
	}
	for _, f := range fleet.Faults() {
		if len(byFault[f]) == 0 || len(normal) == 0 {
			continue
		}
		if o.AUC[f], err = detect.AUC(byFault[f], normal); err != nil {
			return o, err
		}
	}
	if len(faulty) > 0 && len(normal) > 0 {
		if o.AUCAll, err = detect.AUC(faulty, normal); err != nil {
			return o, err
		}
	}

	// Checkpoint and reload. A built-in prior is rebuilt by vae.Load; the
	// custom one cannot be described in the file, so Save is told that a
	// weights-only file is wanted, which is loaded into a model built by
	// the same code.
	o.Checkpoint = filepath.Join(cfg.Out, fileName(priorName))
	if err := m.Save(o.Checkpoint, vae.AllowWeightsOnly()); err != nil {
		return o, err
	}
	var back *vae.Model
	if lap == nil {
		back, err = vae.Load(o.Checkpoint)
	} else {
		var backLap *Laplace
		if back, backLap, err = buildModel(cfg, priorName); err == nil {
			err = back.LoadWeights(o.Checkpoint)
			o.Scales = backLap.Scales()
		}
	}
	if err != nil {
		return o, fmt.Errorf("reloading %s: %w", o.Checkpoint, err)
	}
	again, err := back.Score(ctx, d.test, vae.ScoreOptions{K: cfg.K, Seed: cfg.Seed})
	if err != nil {
		return o, err
	}
	for i := range scores {
		o.ReloadMaxDiff = max(o.ReloadMaxDiff, abs(scores[i]-again[i]))
	}
	return o, nil
}

func fileName(priorName string) string {
	if priorName == "standard normal" {
		return "standard.safetensors"
	}
	return "laplace.safetensors"
}

func abs(x float64) float64 {
	if x < 0 {
		return -x
	}
	return x
}

func printComparison(w io.Writer, res []outcome) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "prior\tval -ELBO\tval KL\tval NLL (IW)\tactive\t"+faultHeader()+"all faults AUC\ttrain s\treload diff\t")
	for _, o := range res {
		fmt.Fprintf(tw, "%s\t%.2f\t%.2f\t%.2f\t%d\t", o.Prior, o.Validation.NegELBO, o.Validation.KL, o.Validation.NLL, o.Validation.ActiveUnits)
		for _, f := range fleet.Faults() {
			fmt.Fprintf(tw, "%.3f\t", o.AUC[f])
		}
		fmt.Fprintf(tw, "%.3f\t%.1f\t%g\t\n", o.AUCAll, o.TrainTime.Seconds(), o.ReloadMaxDiff)
	}
	tw.Flush()
	for _, o := range res {
		if o.Scales != nil {
			fmt.Fprintf(w, "learned Laplace scales: %.3f\n", o.Scales)
		}
	}
	fmt.Fprintln(w, "Scores and NLL in nats per record on standardised features; lower NLL fits the held-out normal data better.")
	fmt.Fprintln(w, Disclaimer)
}

func faultHeader() string {
	s := ""
	for _, f := range fleet.Faults() {
		s += f.String() + " AUC\t"
	}
	return s
}

// writeComparison writes one row per prior.
func writeComparison(path string, res []outcome) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	w := csv.NewWriter(f)
	head := []string{"prior", "val_neg_elbo", "val_kl", "val_iw_nll", "active_units"}
	for _, fa := range fleet.Faults() {
		head = append(head, fa.String()+"_auc")
	}
	head = append(head, "all_faults_auc", "train_seconds")
	if err := w.Write(head); err != nil {
		f.Close()
		return err
	}
	num := func(v float64) string { return strconv.FormatFloat(v, 'f', 4, 64) }
	for _, o := range res {
		row := []string{o.Prior, num(o.Validation.NegELBO), num(o.Validation.KL), num(o.Validation.NLL), strconv.Itoa(o.Validation.ActiveUnits)}
		for _, fa := range fleet.Faults() {
			row = append(row, num(o.AUC[fa]))
		}
		row = append(row, num(o.AUCAll), num(o.TrainTime.Seconds()))
		if err := w.Write(row); err != nil {
			f.Close()
			return err
		}
	}
	w.Flush()
	if err := w.Error(); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}
