package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"errors"
	"flag"
	"image/png"
	"math"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"

	"lowerbound.dev/examples/internal/fleet"
)

func tinyConfig(t *testing.T) Config {
	cfg := DefaultConfig()
	cfg.Out = t.TempDir()
	cfg.Stations = 3
	cfg.HistoryDays = 3
	cfg.ValDays = 1
	cfg.TestDays = 2
	cfg.Interval = 30 * time.Minute
	cfg.Epochs = 1
	cfg.K = 4
	cfg.Hidden = []int{16}
	return cfg
}

// TestRunSmoke runs the whole program on a tiny fleet and checks its
// outputs: the files are there and well-formed, the checkpoint alone
// reproduces the scores in the CSV, and the metrics are proportions.
func TestRunSmoke(t *testing.T) {
	cfg := tinyConfig(t)
	var log bytes.Buffer
	cfg.Log = &log
	res, err := run(context.Background(), cfg)
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(log.String(), "epoch 1/1") {
		t.Errorf("no epoch line in the log:\n%s", log.String())
	}

	for _, p := range []string{res.ScoresPNG, res.ROCPNG} {
		f, err := os.Open(p)
		if err != nil {
			t.Fatal(err)
		}
		c, err := png.DecodeConfig(f)
		f.Close()
		if err != nil {
			t.Fatalf("%s: %v", p, err)
		}
		if c.Width < 100 || c.Height < 100 {
			t.Errorf("%s: %dx%d image", p, c.Width, c.Height)
		}
	}
	if st, err := os.Stat(res.Checkpoint); err != nil || st.Size() == 0 {
		t.Fatalf("checkpoint %s: %v", res.Checkpoint, err)
	}

	// The CSV has one row per test record, with the header's columns.
	f, err := os.Open(res.ScoresCSV)
	if err != nil {
		t.Fatal(err)
	}
	rows, err := csv.NewReader(f).ReadAll()
	f.Close()
	if err != nil {
		t.Fatal(err)
	}
	if len(rows) != res.TestRecords+1 {
		t.Fatalf("%d CSV rows, want %d records and a header", len(rows), res.TestRecords)
	}
	if got := strings.Join(rows[0], ","); got != "station,station_type,time,fault,score,flagged" {
		t.Errorf("header %q", got)
	}

	// Score the test period again from the checkpoint alone (model,
	// standardisation and threshold read from the file) and compare with
	// the CSV; the CSV holds 4 decimals, so the tolerance is 5e-5.
	if res.ReloadMaxDiff != 0 {
		t.Errorf("reloaded model scores differ by up to %g", res.ReloadMaxDiff)
	}
	sc, err := loadScorer(res.Checkpoint)
	if err != nil {
		t.Fatal(err)
	}
	if sc.threshold != res.Threshold {
		t.Errorf("checkpoint threshold %v, run used %v", sc.threshold, res.Threshold)
	}
	fl, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: cfg.Stations, HistoryDays: cfg.HistoryDays, TestDays: cfg.TestDays, Interval: cfg.Interval, Seed: cfg.Seed})
	if err != nil {
		t.Fatal(err)
	}
	raw, err := fleet.ToSet(fl.Test)
	if err != nil {
		t.Fatal(err)
	}
	scores, err := sc.score(context.Background(), raw, cfg.K, cfg.Seed)
	if err != nil {
		t.Fatal(err)
	}
	for i, row := range rows[1:] {
		v, err := strconv.ParseFloat(row[4], 64)
		if err != nil {
			t.Fatalf("row %d: %v", i+2, err)
		}
		if math.Abs(v-scores[i]) > 5e-5 {
			t.Fatalf("row %d: CSV score %v, reloaded model %v", i+2, v, scores[i])
		}
		if row[3] != fl.Test[i].Fault.String() {
			t.Fatalf("row %d: fault %q, want %q", i+2, row[3], fl.Test[i].Fault)
		}
		if flagged := strconv.FormatBool(scores[i] > sc.threshold); row[5] != flagged {
			t.Fatalf("row %d: flagged %q, want %q", i+2, row[5], flagged)
		}
	}

	if len(res.Events) != len(fl.Events) {
		t.Errorf("%d event results for %d events", len(res.Events), len(fl.Events))
	}
	for _, ev := range res.Events {
		if ev.Records == 0 || ev.Flagged > ev.Records || (ev.Flagged == 0) != (ev.FirstFlag < 0) {
			t.Errorf("event result %+v is inconsistent", ev)
		}
	}
	if len(res.PerFault) != len(fleet.Faults()) {
		t.Fatalf("%d per-fault metrics, want %d", len(res.PerFault), len(fleet.Faults()))
	}
	for _, fm := range append(res.PerFault, res.Overall) {
		if fm.Records == 0 {
			t.Errorf("%s: no records", fm.Name)
		}
		for name, v := range map[string]float64{"recall": fm.Recall(), "AUC": fm.AUC, "false positive rate": fm.FalsePositiveRate()} {
			if !(v >= 0 && v <= 1) {
				t.Errorf("%s: %s = %v, want a value in [0, 1]", fm.Name, name, v)
			}
		}
		if p := fm.Precision(); !math.IsNaN(p) && !(p >= 0 && p <= 1) {
			t.Errorf("%s: precision = %v", fm.Name, p)
		}
	}
}

func TestRunCancelled(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := run(ctx, tinyConfig(t)); !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled run: err = %v, want context.Canceled", err)
	}
}

func TestFlags(t *testing.T) {
	var out bytes.Buffer
	if _, err := parseFlags([]string{"-h"}, &out); err != flag.ErrHelp {
		t.Fatalf("-h: err = %v", err)
	}
	help := out.String()
	for _, want := range []string{"-out", "-seed", "-epochs", "-stations", "-days", "-val-days", "-test-days", "-interval", "-k",
		"-quantile", "-latent", "-hidden", "-batch", "-lr", "-sigma", "invented", "screening aid, not a protection system"} {
		if !strings.Contains(help, want) {
			t.Errorf("-h output lacks %q", want)
		}
	}
	cfg, err := parseFlags([]string{"-epochs", "3", "-hidden", "8,4", "-out", "x"}, &out)
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Epochs != 3 || len(cfg.Hidden) != 2 || cfg.Hidden[1] != 4 || cfg.Out != "x" {
		t.Errorf("parsed %+v", cfg)
	}
	for _, bad := range [][]string{{"-quantile", "1"}, {"-epochs", "0"}, {"-hidden", "8,x"}, {"-val-days", "28"}, {"extra"}} {
		if _, err := parseFlags(bad, &out); err == nil {
			t.Errorf("%v: want an error", bad)
		}
	}
}
