package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"errors"
	"flag"
	"fmt"
	"image/png"
	"math"
	"os"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"lowerbound.dev/examples/internal/detect"
	"lowerbound.dev/examples/internal/fleet"
)

func tinyConfig(t *testing.T) Config {
	cfg := DefaultConfig()
	cfg.Out = t.TempDir()
	cfg.Stations = 3
	cfg.HistoryDays = 3
	cfg.ValDays = 1
	cfg.CalDays = 1 // 3 stations * 48 records = 144 >= 99, enough for alpha = 1%
	cfg.TestDays = 2
	cfg.Interval = 30 * time.Minute
	cfg.Epochs = 1
	cfg.K = 4
	cfg.Hidden = []int{16}
	return cfg
}

// TestRunSmoke runs the whole program on a tiny fleet and checks its
// outputs: the files are there and well-formed, the checkpoint alone
// reproduces the scores, alarms and screening in the CSV, the threshold is
// the split-conformal order statistic of the calibration scores, the
// counts behind the reported rates match the CSV, and the metrics are
// proportions.
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
	if got := strings.Join(rows[0], ","); got != "station,station_type,time,fault,score,p_value,alarm,screened" {
		t.Errorf("header %q", got)
	}

	// Score the test period again from the checkpoint alone (model,
	// standardisation and alarm calibration read from the file) and
	// compare with the CSV; the CSV holds 4 decimals, so the tolerance is
	// 5e-5.
	if res.ReloadMaxDiff != 0 {
		t.Errorf("reloaded model scores differ by up to %g", res.ReloadMaxDiff)
	}
	sc, err := loadScorer(res.Checkpoint)
	if err != nil {
		t.Fatal(err)
	}
	if sc.cal.Threshold() != res.Threshold || !slices.Equal(sc.cal.Scores(), res.Calibration.Scores()) {
		t.Errorf("checkpoint threshold %v, run used %v (or the calibration scores differ)", sc.cal.Threshold(), res.Threshold)
	}
	// The checkpoint records the K and seed the calibration was scored
	// with, so that a scoring service scores the same way.
	if ex := sc.model.Extra(); ex[extraLabels] != `["booster","district","transfer"]` {
		t.Errorf("checkpoint %q = %q, want the three station types", extraLabels, ex[extraLabels])
	}
	if ex := sc.model.Extra(); ex[extraScoreK] != strconv.Itoa(cfg.K) || ex[extraScoreSeed] != strconv.FormatUint(cfg.Seed, 10) {
		t.Errorf("checkpoint score settings %q=%q, %q=%q; want K %d, seed %d", extraScoreK, ex[extraScoreK], extraScoreSeed, ex[extraScoreSeed], cfg.K, cfg.Seed)
	}
	// The threshold is the k-th smallest of the n calibration scores, k =
	// ceil((n+1)(1-alpha)) (split conformal; Angelopoulos and Bates 2021):
	// at most n-k scores lie above it and at least n-k+1 at or above it.
	n := res.CalRecords
	k := int(math.Ceil(float64(n+1) * (1 - cfg.Alpha)))
	if res.Calibration.N() != n || res.Calibration.Rank() != k {
		t.Errorf("calibration n %d rank %d, want %d and %d", res.Calibration.N(), res.Calibration.Rank(), n, k)
	}
	above, atOrAbove := 0, 0
	for _, s := range res.Calibration.Scores() {
		if s > res.Threshold {
			above++
		}
		if s >= res.Threshold {
			atOrAbove++
		}
	}
	if above > n-k || atOrAbove < n-k+1 {
		t.Errorf("threshold %v: %d calibration scores above and %d at or above, want <= %d and >= %d", res.Threshold, above, atOrAbove, n-k, n-k+1)
	}
	fl, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: cfg.Stations, HistoryDays: cfg.HistoryDays, TestDays: cfg.TestDays, Interval: cfg.Interval, Seed: cfg.Seed})
	if err != nil {
		t.Fatal(err)
	}
	raw, err := fleet.ToMixedSet(fl.Test)
	if err != nil {
		t.Fatal(err)
	}
	scores, _, err := sc.score(context.Background(), raw, cfg.K, cfg.Seed)
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
		if alarm := strconv.FormatBool(scores[i] > sc.cal.Threshold()); row[6] != alarm {
			t.Fatalf("row %d: alarm %q, want %q", i+2, row[6], alarm)
		}
		// p = (1 + #{calibration >= s}) / (n+1), counted here.
		count := 0
		for _, c := range sc.cal.Scores() {
			if c >= scores[i] {
				count++
			}
		}
		if p, err := strconv.ParseFloat(row[5], 64); err != nil || math.Abs(p-float64(1+count)/float64(n+1)) > 1e-5*p {
			t.Fatalf("row %d: p-value %q, want %v", i+2, row[5], float64(1+count)/float64(n+1))
		}
	}

	// The reported counts are those of the CSV.
	var normalAlarms, normalRecs, screened, screenedNormal int
	for _, row := range rows[1:] {
		isNormal := row[3] == fleet.Normal.String()
		if isNormal {
			normalRecs++
			if row[6] == "true" {
				normalAlarms++
			}
		}
		if row[7] == "true" {
			screened++
			if isNormal {
				screenedNormal++
			}
		}
	}
	fa := res.NormalAlarms
	if fa.Alarms != normalAlarms || fa.Records != normalRecs || fa.Records != res.NormalTestRecords {
		t.Errorf("false alarms %d of %d, the CSV has %d of %d", fa.Alarms, fa.Records, normalAlarms, normalRecs)
	}
	if !(fa.Low <= fa.Rate && fa.Rate <= fa.High) || math.Abs(fa.Rate-float64(normalAlarms)/float64(normalRecs)) > 1e-15 {
		t.Errorf("false-alarm rate %v with interval [%v, %v]", fa.Rate, fa.Low, fa.High)
	}
	if res.ScreenFlags != screened || res.ScreenFalse != screenedNormal || !(res.MeanFDP >= 0 && res.MeanFDP <= 1) {
		t.Errorf("screening: %d flags, %d normal, mean FDP %v; the CSV has %d and %d", res.ScreenFlags, res.ScreenFalse, res.MeanFDP, screened, screenedNormal)
	}
	// Two days screened in daily batches.
	if res.Batches != 2 {
		t.Errorf("%d screening batches, want 2", res.Batches)
	}
	// Two test days make one drift window of DriftDays = 7 holding every
	// normal record.
	if len(res.Drift) != 1 || res.Drift[0].Window != res.NormalTestRecords {
		t.Fatalf("drift windows %+v, want one of %d records", res.Drift, res.NormalTestRecords)
	}
	for _, d := range res.Drift {
		if !(d.KS >= 0 && d.KS <= 1 && d.KSPValue >= 0 && d.KSPValue <= 1 && d.AllKS >= 0 && d.AllKS <= 1) || d.Alarms != normalAlarms {
			t.Errorf("drift %+v", d)
		}
	}

	// The report states the alarm rule, both operating points, the drift
	// check and the caution.
	var rep bytes.Buffer
	printReport(&rep, cfg, res)
	for _, want := range []string{"split conformal", "alpha = 1%", "Clopper-Pearson", "alarm, alpha 1%", "screened, FDR 10%",
		"drift check", "alarm.calibration", "screening aid, not a protection system", "local codes and qualified staff"} {
		if !strings.Contains(rep.String(), want) {
			t.Errorf("report lacks %q:\n%s", want, rep.String())
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
		for _, d := range []detect.Detection{fm.Alarm, fm.Screened} {
			for name, v := range map[string]float64{"recall": d.Recall(), "AUC": fm.AUC, "false positive rate": d.FalsePositiveRate()} {
				if !(v >= 0 && v <= 1) {
					t.Errorf("%s: %s = %v, want a value in [0, 1]", fm.Name, name, v)
				}
			}
			if p := d.Precision(); !math.IsNaN(p) && !(p >= 0 && p <= 1) {
				t.Errorf("%s: precision = %v", fm.Name, p)
			}
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
	for _, want := range []string{"-out", "-seed", "-epochs", "-stations", "-days", "-val-days", "-cal-days", "-test-days", "-interval", "-k",
		"-alpha", "-fdr", "-screen", "-drift-days", "-latent", "-hidden", "-batch", "-lr", "-sigma", "-missing", "-train", "-score", "-schema", "invented",
		"screening aid, not a protection system", "local codes"} {
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
	for _, bad := range [][]string{{"-alpha", "1"}, {"-fdr", "0"}, {"-epochs", "0"}, {"-hidden", "8,x"}, {"-val-days", "28"},
		{"-cal-days", "0"}, {"-screen", "1m"}, {"-drift-days", "0"}, {"extra"}, {"-missing", "0.95"}, {"-train", "a.csv"},
		{"-schema", "s.json"}} {
		if _, err := parseFlags(bad, &out); err == nil {
			t.Errorf("%v: want an error", bad)
		}
	}
	// 5 calibration days of 12 stations are 8640 records; alpha = 0.01%
	// needs 1/0.0001 - 1 = 9999.
	out.Reset()
	if _, err := parseFlags([]string{"-alpha", "0.0001"}, &out); err == nil || !strings.Contains(out.String(), "needs at least 9999") {
		t.Errorf("-alpha 0.0001: err %v, output %q; want it to say 9999 records are needed", err, out.String())
	}
}

// TestRunFiles runs the screening on user files written here (a CSV with a
// schema: real, count, categorical columns and empty cells) and checks the
// outputs: the scored file is read with the checkpoint's schema, the
// reloaded model gives the same scores, the CSV has a row per record, and
// the record with the shifted reading alarms with that column on top.
func TestRunFiles(t *testing.T) {
	dir := t.TempDir()
	write := func(name, text string) string {
		p := dir + "/" + name
		if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
			t.Fatal(err)
		}
		return p
	}
	row := func(b *strings.Builder, i int, shift float64, blank bool) {
		a := math.Sin(float64(i) / 7)
		v := strconv.FormatFloat(2*a+0.05*math.Cos(float64(i)), 'f', 4, 64)
		if blank {
			v = ""
		}
		fmt.Fprintf(b, "%s,%.4f,%d,%s\n", v, a+shift, i%3, []string{"on", "off"}[i%2])
	}
	var tr, sc strings.Builder
	tr.WriteString("temp,press,starts,state\n")
	sc.WriteString("temp,press,starts,state\n")
	for i := 0; i < 1200; i++ {
		row(&tr, i, 0, i%17 == 0)
	}
	for i := 0; i < 50; i++ {
		shift := 0.0
		if i == 7 {
			shift = 8
		}
		row(&sc, i, shift, i%5 == 0)
	}
	cfg := tinyConfig(t)
	cfg.TrainFile = write("train.csv", tr.String())
	cfg.ScoreFile = write("score.csv", sc.String())
	cfg.SchemaFile = write("schema.json", `{"columns": [{"name": "temp", "kind": "real"}, {"name": "press", "kind": "real"},
 {"name": "starts", "kind": "count"}, {"name": "state", "kind": "categorical", "categories": ["on", "off"]}]}`)
	cfg.Epochs = 30
	res, err := runFiles(context.Background(), cfg)
	if err != nil {
		t.Fatal(err)
	}
	if res.Scored != 50 || res.MissingScored != 10 || res.MissingTrain != 71 {
		t.Errorf("scored %d (missing %d), train missing %d; want 50, 10, 71", res.Scored, res.MissingScored, res.MissingTrain)
	}
	if res.ReloadMaxDiff != 0 {
		t.Errorf("reloaded scores differ by %g", res.ReloadMaxDiff)
	}
	if !res.Alarms[7] || res.Top[7][0].Name != "press" {
		t.Errorf("record 7 (press shifted by 8): alarm %v, top %v", res.Alarms[7], res.Top[7])
	}
	f, err := os.Open(res.ScoresCSV)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil || len(rows) != 51 {
		t.Fatalf("scores CSV: %d rows, %v", len(rows), err)
	}
	var rep bytes.Buffer
	printFilesReport(&rep, cfg, res)
	if !strings.Contains(rep.String(), "top inputs") {
		t.Errorf("report:\n%s", rep.String())
	}
	// A category not in the schema names its line and column.
	cfg.ScoreFile = write("bad.csv", "temp,press,starts,state\n1,2,0,on\n1,2,0,stalled\n")
	if _, err := runFiles(context.Background(), cfg); err == nil || !strings.Contains(err.Error(), `line 3, column 4 ("state")`) {
		t.Errorf("unknown category: err = %v", err)
	}
}

// TestRunMissing runs the tiny fleet with dropouts: the report has the
// imputation comparison at three rates and top inputs for every event.
func TestRunMissing(t *testing.T) {
	cfg := tinyConfig(t)
	cfg.Missing = 0.2
	res, err := run(context.Background(), cfg)
	if err != nil {
		t.Fatal(err)
	}
	if len(res.Imputation) != 3 {
		t.Fatalf("imputation rows %+v", res.Imputation)
	}
	for _, r := range res.Imputation {
		if r.Hidden == 0 || math.IsNaN(r.RMSEModel) || math.IsNaN(r.RMSEMean) || r.ModeAccModel < 0 || r.ModeAccModel > 1 {
			t.Errorf("imputation row %+v", r)
		}
	}
	for _, ev := range res.Events {
		if len(ev.Top) != 3 || ev.Top[0].Excess < ev.Top[1].Excess {
			t.Errorf("event %v: top inputs %+v", ev.Fault, ev.Top)
		}
	}
}
