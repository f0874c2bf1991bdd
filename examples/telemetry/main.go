package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"os/signal"
	"strconv"
	"strings"

	"lowerbound.dev/examples/internal/fleet"
)

func main() {
	cfg, err := parseFlags(os.Args[1:], os.Stderr)
	if err == flag.ErrHelp {
		os.Exit(0)
	}
	if err != nil {
		os.Exit(2)
	}
	cfg.Log = os.Stdout
	cfg.Progress = os.Stderr
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	fmt.Println(Disclaimer)
	res, err := run(ctx, cfg)
	if err != nil {
		fmt.Fprintln(os.Stderr, "telemetry:", err)
		os.Exit(1)
	}
	printReport(os.Stdout, cfg, res)
}

func parseFlags(args []string, stderr io.Writer) (Config, error) {
	cfg := DefaultConfig()
	fs := flag.NewFlagSet("telemetry", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprint(fs.Output(), `Usage: telemetry [flags]

Trains a variational autoencoder on the normal operation of an invented
fleet of pumping stations (the data is simulated for this demo), then scores
a test period with injected faults (bearing wear, cavitation, a stuck
sensor) and reports precision, recall and ROC AUC per fault type. Writes
scores.png, roc.png, model.safetensors and scores.csv to -out.

The scores are a screening aid, not a protection system: alarms, trips and
inspections follow the site's own procedures and qualified staff.

Flags:
`)
		fs.PrintDefaults()
	}
	fs.StringVar(&cfg.Out, "out", cfg.Out, "output `folder` for the plots, the checkpoint and the CSV (created if missing)")
	fs.Uint64Var(&cfg.Seed, "seed", cfg.Seed, "seed of the invented data, the weights, the shuffling and the scoring noise")
	fs.IntVar(&cfg.Epochs, "epochs", cfg.Epochs, "training epochs (the weights of the epoch with the best validation loss are kept)")
	fs.IntVar(&cfg.Stations, "stations", cfg.Stations, "stations in the fleet; the types and the faults are dealt in turn")
	fs.IntVar(&cfg.HistoryDays, "days", cfg.HistoryDays, "days of normal history before the test period, validation days included")
	fs.IntVar(&cfg.ValDays, "val-days", cfg.ValDays, "last days of the history held out as validation: they pick the best epoch and set the threshold")
	fs.IntVar(&cfg.TestDays, "test-days", cfg.TestDays, "days of the test period, into which the faults are injected")
	fs.DurationVar(&cfg.Interval, "interval", cfg.Interval, "sampling interval of the sensors")
	fs.IntVar(&cfg.K, "k", cfg.K, "importance samples per score (1 scores by the negative ELBO)")
	fs.Float64Var(&cfg.Quantile, "quantile", cfg.Quantile, "quantile of the validation scores used as the alarm threshold, in (0, 1)")
	fs.IntVar(&cfg.Latent, "latent", cfg.Latent, "latent dimensions")
	hidden := intList(cfg.Hidden)
	fs.Var(&hidden, "hidden", "comma-separated hidden `widths` of the encoder (the decoder mirrors them)")
	fs.IntVar(&cfg.BatchSize, "batch", cfg.BatchSize, "records per optimiser step")
	fs.Float64Var(&cfg.LearnRate, "lr", cfg.LearnRate, "Adam learning rate")
	fs.Float64Var(&cfg.Sigma, "sigma", cfg.Sigma, "fixed Gaussian sigma in standardised units; 0 learns one sigma per sensor")
	if err := fs.Parse(args); err != nil {
		return cfg, err
	}
	if fs.NArg() > 0 {
		err := fmt.Errorf("unexpected arguments %q", fs.Args())
		fmt.Fprintln(stderr, "telemetry:", err)
		fs.Usage()
		return cfg, err
	}
	cfg.Hidden = hidden
	if err := cfg.validate(); err != nil {
		fmt.Fprintln(stderr, "telemetry:", err)
		return cfg, err
	}
	return cfg, nil
}

// intList is a flag.Value of comma-separated positive integers.
type intList []int

func (l *intList) String() string {
	if l == nil {
		return ""
	}
	s := make([]string, len(*l))
	for i, v := range *l {
		s[i] = strconv.Itoa(v)
	}
	return strings.Join(s, ",")
}

func (l *intList) Set(v string) error {
	var out []int
	for _, f := range strings.Split(v, ",") {
		n, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || n < 1 {
			return fmt.Errorf("%q is not a positive integer", f)
		}
		out = append(out, n)
	}
	*l = out
	return nil
}

func printReport(w io.Writer, cfg Config, res Result) {
	fmt.Fprintf(w, "\nthreshold %.2f nats = %.0fth percentile of %d validation scores (K = %d); flags %.1f%% of the %d normal test records\n",
		res.Threshold, 100*cfg.Quantile, res.ValRecords, cfg.K, 100*res.NormalFlagRate, res.NormalTestRecords)
	fmt.Fprintf(w, "\n%-14s %8s %9s %7s %7s\n", "fault", "records", "precision", "recall", "ROC AUC")
	for _, fm := range append(append([]FaultMetrics{}, res.PerFault...), res.Overall) {
		fmt.Fprintf(w, "%-14s %8d %9s %7s %7s\n", fm.Name, fm.Records, num(fm.Precision()), num(fm.Recall()), num(fm.AUC))
	}
	fmt.Fprintln(w, "\nprecision and AUC of a fault type count its records against the normal records of the test period")
	fmt.Fprintf(w, "\n%-8s %-9s %-26s %8s %8s %s\n", "station", "type", "fault", "records", "flagged", "first flag after onset")
	for _, ev := range res.Events {
		what := ev.Fault.String()
		if ev.Sensor >= 0 {
			what += " (" + fleet.SensorNames()[ev.Sensor] + ")"
		}
		first := "never"
		if ev.FirstFlag >= 0 {
			first = ev.FirstFlag.String()
		}
		fmt.Fprintf(w, "%-8d %-9s %-26s %8d %8d %s\n", ev.Station, fleet.StationTypes()[ev.StationType].Name, what, ev.Records, ev.Flagged, first)
	}
	fmt.Fprintf(w, "\ncheckpoint round trip: largest score difference %g\n", res.ReloadMaxDiff)
	fmt.Fprintf(w, "wrote %s, %s, %s, %s in %.1fs\n", res.ScoresPNG, res.ROCPNG, res.Checkpoint, res.ScoresCSV, res.Duration.Seconds())
	fmt.Fprintln(w, Disclaimer)
}

// num formats a proportion, or "-" when it is undefined (NaN).
func num(v float64) string {
	if math.IsNaN(v) {
		return "-"
	}
	return fmt.Sprintf("%.3f", v)
}
