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
	"lowerbound.dev/vae/alarm"
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
	if cfg.TrainFile != "" {
		res, err := runFiles(ctx, cfg)
		if err != nil {
			fmt.Fprintln(os.Stderr, "telemetry:", err)
			os.Exit(1)
		}
		printFilesReport(os.Stdout, cfg, res)
		return
	}
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
fleet of pumping stations (the data is simulated for this demo), sets an
alarm threshold with a stated false-alarm rate (split conformal, -alpha) on
held-out normal days, then scores a test period with injected faults
(bearing wear, cavitation, a stuck sensor). Reports per fault type the
precision and recall at the threshold and under batch screening at a target
false discovery rate (Benjamini-Hochberg, -fdr), the false-alarm rate seen
on normal test records with its interval, a drift check per window of
-drift-days, the inputs that drive each fault's alarms and an imputation
comparison. Records are mixed (sensors, an operating mode, a start count);
-missing drops readings out. Writes scores.png, roc.png, model.safetensors
(with the alarm calibration) and scores.csv to -out.

With -train FILE -score FILE [-schema FILE] the same screening runs on
your own CSV files instead of the invented fleet.

The scores are a screening aid, not a protection system: alarms, trips and
inspections follow the site's own procedures, local codes and qualified
staff.

Flags:
`)
		fs.PrintDefaults()
	}
	fs.StringVar(&cfg.Out, "out", cfg.Out, "output `folder` for the plots, the checkpoint and the CSV (created if missing)")
	fs.Uint64Var(&cfg.Seed, "seed", cfg.Seed, "seed of the invented data, the weights, the shuffling and the scoring noise")
	fs.IntVar(&cfg.Epochs, "epochs", cfg.Epochs, "training epochs (the weights of the epoch with the best validation loss are kept)")
	fs.IntVar(&cfg.Stations, "stations", cfg.Stations, "stations in the fleet; the types and the faults are dealt in turn")
	fs.IntVar(&cfg.HistoryDays, "days", cfg.HistoryDays, "days of normal history before the test period, validation and calibration days included")
	fs.IntVar(&cfg.ValDays, "val-days", cfg.ValDays, "days of the history, before the calibration days, held out as validation: they pick the best epoch")
	fs.IntVar(&cfg.CalDays, "cal-days", cfg.CalDays, "last days of the history held out to calibrate the alarm threshold (not used to train or to pick the epoch)")
	fs.IntVar(&cfg.TestDays, "test-days", cfg.TestDays, "days of the test period, into which the faults are injected")
	fs.DurationVar(&cfg.Interval, "interval", cfg.Interval, "sampling interval of the sensors")
	fs.IntVar(&cfg.K, "k", cfg.K, "importance samples per score (1 scores by the negative ELBO)")
	fs.Float64Var(&cfg.Alpha, "alpha", cfg.Alpha, "false-alarm rate of the alarm threshold, in (0, 1): a normal record alarms with probability at most alpha")
	fs.Float64Var(&cfg.FDR, "fdr", cfg.FDR, "target false discovery rate of the batch screening, in (0, 1)")
	fs.DurationVar(&cfg.Screen, "screen", cfg.Screen, "length of one screening batch: the fleet's records in each such window are screened together")
	fs.IntVar(&cfg.DriftDays, "drift-days", cfg.DriftDays, "days per window of the drift check of the test period")
	fs.IntVar(&cfg.Latent, "latent", cfg.Latent, "latent dimensions")
	hidden := intList(cfg.Hidden)
	fs.Var(&hidden, "hidden", "comma-separated hidden `widths` of the encoder (the decoder mirrors them)")
	fs.IntVar(&cfg.BatchSize, "batch", cfg.BatchSize, "records per optimiser step")
	fs.Float64Var(&cfg.LearnRate, "lr", cfg.LearnRate, "Adam learning rate")
	fs.Float64Var(&cfg.Sigma, "sigma", cfg.Sigma, "fixed Gaussian sigma in standardised units; 0 learns one sigma per sensor")
	fs.Float64Var(&cfg.Missing, "missing", cfg.Missing, "fraction of sensor readings lost to transmitter dropouts in the invented fleet, in [0, 0.9]")
	fs.BoolVar(&cfg.NoImpute, "no-impute", cfg.NoImpute, "skip the imputation comparison (readings hidden at random at 10%, 30%, 50%)")
	fs.StringVar(&cfg.TrainFile, "train", "", "CSV `file` of a normal period to train on instead of the invented fleet (needs -score)")
	fs.StringVar(&cfg.ScoreFile, "score", "", "CSV `file` to score with the model trained on -train")
	fs.StringVar(&cfg.SchemaFile, "schema", "", "JSON `file` of the columns of -train and -score: {\"columns\": [{\"name\", \"kind\": real|positive|count|binary|categorical, \"categories\"}]}; without it every column is real")
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
	c := res.Calibration
	lo, hi := c.Guarantee()
	fmt.Fprintf(w, "\nalarm threshold %.2f nats (K = %d): split conformal for a false-alarm rate alpha = %g%%, the %dth smallest of %d calibration scores (%d held-out normal days)\n",
		c.Threshold(), cfg.K, 100*c.Alpha(), c.Rank(), c.N(), cfg.CalDays)
	fmt.Fprintf(w, "  a normal record exchangeable with the calibration days alarms with probability between %.3f%% and %.3f%%\n", 100*lo, 100*hi)
	fa := res.NormalAlarms
	fmt.Fprintf(w, "  normal test records: %d of %d alarm = %s, 95%% Clopper-Pearson interval [%s, %s]\n",
		fa.Alarms, fa.Records, pct(fa.Rate), pct(fa.Low), pct(fa.High))
	fmt.Fprintf(w, "screening at FDR %g%%: %d batches of %v (Benjamini-Hochberg on conformal p-values); %d flags, %d of them normal records; false discovery proportion %s overall, %s averaged over batches\n",
		100*cfg.FDR, res.Batches, cfg.Screen, res.ScreenFlags, res.ScreenFalse, pct(ratio(res.ScreenFalse, res.ScreenFlags)), pct(res.MeanFDP))

	fmt.Fprintf(w, "\n%-14s %8s | %-19s | %-19s | %7s\n", "", "", fmt.Sprintf("alarm, alpha %g%%", 100*cfg.Alpha), fmt.Sprintf("screened, FDR %g%%", 100*cfg.FDR), "")
	fmt.Fprintf(w, "%-14s %8s | %9s %9s | %9s %9s | %7s\n", "fault", "records", "precision", "recall", "precision", "recall", "ROC AUC")
	for _, fm := range append(append([]FaultMetrics{}, res.PerFault...), res.Overall) {
		fmt.Fprintf(w, "%-14s %8d | %9s %9s | %9s %9s | %7s\n", fm.Name, fm.Records, num(fm.Alarm.Precision()), num(fm.Alarm.Recall()),
			num(fm.Screened.Precision()), num(fm.Screened.Recall()), num(fm.AUC))
	}
	fmt.Fprintln(w, "\nprecision and AUC of a fault type count its records against the normal records of the test period")

	fmt.Fprintf(w, "\ndrift check: normal test records of each window against the %d calibration scores\n", c.N())
	fmt.Fprintf(w, "%-15s %8s %7s %9s %8s %8s %-19s %8s  %s\n", "window", "records", "KS D", "KS p", "alarms", "rate", "95% interval", "KS all", "verdict")
	for _, d := range res.Drift {
		verdict := "rate consistent with alpha"
		switch {
		case d.RateAboveAlpha():
			verdict = "rate above alpha: recalibrate"
		case d.RateHigh < lo:
			verdict = "rate below alpha"
		}
		fmt.Fprintf(w, "%-15s %8d %7.3f %9.2g %8d %8s %-19s %8.3f  %s\n", d.From.Format("Jan 2")+" - "+d.To.Format("Jan 2"), d.Window, d.KS, d.KSPValue,
			d.Alarms, pct(d.Rate), "["+pct(d.RateLow)+", "+pct(d.RateHigh)+"]", d.AllKS, verdict)
	}
	fmt.Fprintln(w, "KS D is the largest gap between the score distributions (0 = same); KS all includes the faulty records.")
	fmt.Fprintln(w, "Consecutive records are correlated, so the KS p-value and the interval, which assume independent records, overstate their precision.")

	fmt.Fprintf(w, "\n%-8s %-9s %-26s %8s %8s %9s %-23s %s\n", "station", "type", "fault", "records", "alarms", "screened", "first alarm after onset", "top inputs")
	for _, ev := range res.Events {
		what := ev.Fault.String()
		if ev.Sensor >= 0 {
			what += " (" + fleet.SensorNames()[ev.Sensor] + ")"
		}
		first := "never"
		if ev.FirstFlag >= 0 {
			first = ev.FirstFlag.String()
		}
		fmt.Fprintf(w, "%-8d %-9s %-26s %8d %8d %9d %-23s %s\n", ev.Station, fleet.StationTypes()[ev.StationType].Name, what, ev.Records, ev.Flagged, ev.Screened, first, topString(ev.Top))
	}
	fmt.Fprintln(w, "top inputs: mean contribution to -log p(x|z) over the event's alarmed records, less the mean over normal test records, in nats")
	if len(res.Imputation) > 0 {
		fmt.Fprintf(w, "\nimputation of readings hidden completely at random (clean test records; model: conditional mean at the posterior mean, mode for categories)\n")
		fmt.Fprintf(w, "%7s %8s | %-23s | %-23s | %-21s\n", "", "", "sensors RMSE (std units)", "mode accuracy", "starts MAE")
		fmt.Fprintf(w, "%7s %8s | %11s %11s | %11s %11s | %10s %10s\n", "missing", "hidden", "model", "col. mean", "model", "majority", "model", "col. mean")
		for _, r := range res.Imputation {
			fmt.Fprintf(w, "%6.0f%% %8d | %11.3f %11.3f | %11.3f %11.3f | %10.3f %10.3f\n", 100*r.Rate, r.Hidden, r.RMSEModel, r.RMSEMean,
				r.ModeAccModel, r.ModeAccMajor, r.StartsMAEModel, r.StartsMAE)
		}
	}
	fmt.Fprintf(w, "\ncheckpoint round trip: largest score difference %g; alarm calibration stored under %q\n", res.ReloadMaxDiff, alarm.MetadataKey)
	fmt.Fprintf(w, "wrote %s, %s, %s, %s in %.1fs\n", res.ScoresPNG, res.ROCPNG, res.Checkpoint, res.ScoresCSV, res.Duration.Seconds())
	fmt.Fprintln(w, Disclaimer)
}

// pct formats a proportion as a percentage, or "-" when it is NaN.
func pct(v float64) string {
	if math.IsNaN(v) {
		return "-"
	}
	return fmt.Sprintf("%.2f%%", 100*v)
}

// ratio is a/b, NaN when b is 0.
func ratio(a, b int) float64 {
	if b == 0 {
		return math.NaN()
	}
	return float64(a) / float64(b)
}

// num formats a proportion, or "-" when it is undefined (NaN).
func num(v float64) string {
	if math.IsNaN(v) {
		return "-"
	}
	return fmt.Sprintf("%.3f", v)
}

// topString formats the top contributing inputs.
func topString(top []Contribution) string {
	var parts []string
	for _, c := range top {
		parts = append(parts, fmt.Sprintf("%s %+.1f", c.Name, c.Excess))
	}
	return strings.Join(parts, ", ")
}
