package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"os/signal"
	"path/filepath"
	"syscall"
	"time"
)

// Config is everything the command needs.
type Config struct {
	Addr       string
	Model      string // checkpoint; empty trains a demo model into Out
	Out        string
	Seed       uint64
	Epochs     int
	K          int // 0: the checkpoint's
	SeedSet    bool
	Mean       bool
	MaxBody    int64
	MaxRecords int
}

func defaultConfig() Config {
	return Config{Addr: "127.0.0.1:8080", Out: filepath.Join("out", "scoreserver"), Seed: 1, Epochs: 8,
		MaxBody: 1 << 20, MaxRecords: 1000}
}

func main() {
	cfg, err := parseFlags(os.Args[1:], os.Stderr)
	if errors.Is(err, flag.ErrHelp) {
		os.Exit(0)
	}
	if err != nil {
		os.Exit(2)
	}
	log := slog.New(slog.NewTextHandler(os.Stderr, nil))
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if err := serve(ctx, cfg, log, nil); err != nil {
		fmt.Fprintln(os.Stderr, "scoreserver:", err)
		os.Exit(1)
	}
}

func parseFlags(args []string, stderr io.Writer) (Config, error) {
	cfg := defaultConfig()
	fs := flag.NewFlagSet("scoreserver", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprint(fs.Output(), `Usage: scoreserver [flags]

Serves anomaly scores of a checkpoint (the telemetry example's) over HTTP:
  POST /score    {"values":{"flow_m3h":120,"mode":"normal","vib_x_mms":null,...},"label":"booster","key":7}
                 or "values" as an array in column order, or {"records":[...]}; null or an absent
                 column is a missing value; "columns":true adds each column's part of the score.
                 Answers score, p_value and flagged (the checkpoint's alarm calibration).
  GET  /healthz  the checkpoint served: columns, classes, score settings, calibration
  GET  /metrics  Prometheus metrics
  POST /reload   read the checkpoint file again (also on SIGHUP); a bad file keeps the old model
Scores with the K and seed the checkpoint's calibration was scored with (metadata score.k,
score.seed); a conflicting -k is refused. Without -model, trains a small demo model of the
telemetry example's kind on an invented fleet first and writes it to -out.

Flags:
`)
		fs.PrintDefaults()
	}
	fs.StringVar(&cfg.Addr, "addr", cfg.Addr, "listen `address`")
	fs.StringVar(&cfg.Model, "model", cfg.Model, "checkpoint `file` written by the telemetry example (empty: train a demo model)")
	fs.StringVar(&cfg.Out, "out", cfg.Out, "`folder` for the demo model's checkpoint")
	fs.Uint64Var(&cfg.Seed, "seed", cfg.Seed, "seed of the demo data and weights, and of the scoring noise (default for scoring: the checkpoint's score.seed)")
	fs.IntVar(&cfg.Epochs, "epochs", cfg.Epochs, "training epochs of the demo model")
	fs.IntVar(&cfg.K, "k", cfg.K, "importance samples per score (1 scores by the negative ELBO); 0: the checkpoint's score.k, else 1 (the demo model: 16). Must match a calibrated checkpoint's")
	fs.BoolVar(&cfg.Mean, "mean", cfg.Mean, "score deterministically at the posterior mean (no sampling; needs -k 1 or 0); refused for a checkpoint calibrated on sampled scores")
	fs.Int64Var(&cfg.MaxBody, "max-body", cfg.MaxBody, "largest request body, `bytes`")
	fs.IntVar(&cfg.MaxRecords, "max-records", cfg.MaxRecords, "most records in one request")
	if err := fs.Parse(args); err != nil {
		return cfg, err
	}
	fs.Visit(func(f *flag.Flag) { cfg.SeedSet = cfg.SeedSet || f.Name == "seed" })
	var err error
	switch {
	case fs.NArg() > 0:
		err = fmt.Errorf("unexpected arguments %q", fs.Args())
	case cfg.Epochs < 1:
		err = fmt.Errorf("-epochs %d: want >= 1", cfg.Epochs)
	case cfg.K < 0:
		err = fmt.Errorf("-k %d: want >= 1 (or 0: the checkpoint's)", cfg.K)
	case cfg.Mean && cfg.K > 1:
		err = fmt.Errorf("-k %d with -mean: the score at the posterior mean takes no samples, want -k 1", cfg.K)
	case cfg.MaxBody < 1:
		err = fmt.Errorf("-max-body %d: want >= 1", cfg.MaxBody)
	case cfg.MaxRecords < 1:
		err = fmt.Errorf("-max-records %d: want >= 1", cfg.MaxRecords)
	case cfg.Model == "" && cfg.Out == "":
		err = errors.New("-out: empty (needed for the demo model when -model is not given)")
	}
	if err != nil {
		fmt.Fprintln(stderr, "scoreserver:", err)
		fs.Usage()
		return cfg, err
	}
	return cfg, nil
}

// serve runs the service until ctx is done, then shuts down gracefully.
// When ready is not nil it receives the listening address.
func serve(ctx context.Context, cfg Config, log *slog.Logger, ready chan<- string) error {
	path := cfg.Model
	if path == "" {
		log.Info("no -model: training the demo model on the invented fleet", "out", cfg.Out, "epochs", cfg.Epochs)
		var err error
		k := cfg.K
		if k == 0 {
			k = demoK
		}
		if path, err = trainDemo(ctx, cfg.Out, cfg.Seed, cfg.Epochs, k, demoFleet()); err != nil {
			return fmt.Errorf("demo model: %w", err)
		}
	}
	s, err := newServer(path, Options{K: cfg.K, Seed: cfg.Seed, SeedSet: cfg.SeedSet, Mean: cfg.Mean, MaxBody: cfg.MaxBody, MaxRecords: cfg.MaxRecords, Log: log})
	if err != nil {
		return err
	}
	ln, err := net.Listen("tcp", cfg.Addr)
	if err != nil {
		return err
	}
	srv := &http.Server{Handler: s.handler(), ReadHeaderTimeout: 5 * time.Second, ReadTimeout: 30 * time.Second,
		WriteTimeout: 30 * time.Second, IdleTimeout: 2 * time.Minute}

	hup := make(chan os.Signal, 1)
	signal.Notify(hup, syscall.SIGHUP)
	defer signal.Stop(hup)
	go func() {
		for {
			select {
			case <-hup:
				_ = s.reload() // logged; a failed load keeps the old model
			case <-ctx.Done():
				return
			}
		}
	}()

	errc := make(chan error, 1)
	go func() { errc <- srv.Serve(ln) }()
	l := s.cur.Load()
	log.Info("serving", "addr", ln.Addr().String(), "model", path, "k", l.score.K, "seed", l.score.Seed, "score_from", l.score.From, "lean", l.lean)
	if ready != nil {
		ready <- ln.Addr().String()
	}
	select {
	case err := <-errc:
		return err
	case <-ctx.Done():
	}
	log.Info("shutting down: finishing the requests in flight")
	sctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if err := srv.Shutdown(sctx); err != nil {
		return err
	}
	if err := <-errc; !errors.Is(err, http.ErrServerClosed) {
		return err
	}
	return nil
}
