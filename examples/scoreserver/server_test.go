package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"math"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// The mixed test model: three real sensors, an operating mode, a start
// count; conditional on two station types.
var (
	mixedSchema = dataset.Schema{Columns: []dataset.SchemaColumn{
		{Name: "flow_m3h", Kind: dataset.KindReal},
		{Name: "vib_x_mms", Kind: dataset.KindReal},
		{Name: "temp_c", Kind: dataset.KindReal},
		{Name: "mode", Kind: dataset.KindCategorical, Categories: []string{"low", "normal", "high"}},
		{Name: "starts", Kind: dataset.KindCount},
	}}
	mixedStd = dataset.Standardizer{Mean: []float64{120, 1.6, 45, 0, 0}, Std: []float64{30, 0.3, 3, 1, 1}}
)

const (
	mixedK     = 3 // the K the mixed checkpoint's calibration is scored with
	mixedSeed  = 5
	mixedAlpha = 0.05
	mixedCal   = 199 // calibration records
)

// writeMixed saves an (untrained) mixed-column model of the telemetry
// example's kind to path, with its schema, standardizer, class names, the
// score settings and an alarm calibration from its own scores of mixedCal
// random records (K = mixedK, seed mixedSeed). It returns the model and
// the calibration scores.
func writeMixed(t testing.TB, path string, seed uint64) (*vae.Model, []float64) {
	t.Helper()
	cols, err := vae.ColumnsFromSchema(mixedSchema, true)
	if err != nil {
		t.Fatal(err)
	}
	lik, err := losses.NewColumns("likelihood", cols, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: len(cols), Hidden: []int{16}, Latent: 3, Classes: 2, Likelihood: lik, Seed: seed})
	if err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(seed, 9))
	x := make([]float64, 0, mixedCal*5)
	labels := make([]int, mixedCal)
	for i := range mixedCal {
		x = append(x, rng.NormFloat64(), rng.NormFloat64(), rng.NormFloat64(), float64(rng.IntN(3)), float64(rng.IntN(4)))
		labels[i] = i % 2
	}
	set, err := dataset.NewMissing(x, mixedCal, 5)
	if err == nil {
		set, err = set.WithLabels(labels, 2)
	}
	if err != nil {
		t.Fatal(err)
	}
	calScores, err := m.Score(context.Background(), set, vae.ScoreOptions{K: mixedK, Seed: mixedSeed})
	if err != nil {
		t.Fatal(err)
	}
	c, err := alarm.Calibrate(calScores, mixedAlpha)
	if err != nil {
		t.Fatal(err)
	}
	if err := alarm.Put(m, c); err != nil {
		t.Fatal(err)
	}
	if err := m.SetSchema(mixedSchema); err != nil {
		t.Fatal(err)
	}
	if err := m.SetStandardizer(mixedStd); err != nil {
		t.Fatal(err)
	}
	for k, v := range map[string]string{extraScoreK: strconv.Itoa(mixedK), extraScoreSeed: strconv.Itoa(mixedSeed), extraLabels: `["booster","district"]`} {
		if err := m.SetExtra(k, v); err != nil {
			t.Fatal(err)
		}
	}
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	return m, calScores
}

// The legacy test model: the first telemetry checkpoints' all-real
// sensors, with the telemetry.* metadata and no score settings.
var legacyStd = dataset.Standardizer{
	Mean: []float64{120, 2.2, 6.6, 45, 44, 70, 1.6, 1.6, 1.1, 60, 30, 2960},
	Std:  []float64{30, 0.3, 0.8, 3, 3, 5, 0.3, 0.3, 0.2, 10, 6, 40},
}

const legacyValues = "[125,2.1,6.9,46,44,71,1.7,1.5,1.0,62,31,2955]"

// writeLegacy saves an (untrained) all-real telemetry model with the
// legacy metadata and a calibration of threshold 25 to path.
func writeLegacy(t testing.TB, path string, seed uint64) *vae.Model {
	t.Helper()
	lik, err := losses.NewLearnedGaussian("likelihood", 12, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: 12, Hidden: []int{16}, Latent: 4, Classes: 3, Likelihood: lik, Seed: seed})
	if err != nil {
		t.Fatal(err)
	}
	z, _ := json.Marshal(legacyStd)
	for k, v := range map[string]string{legacyStandardizer: string(z),
		legacyFeatures: `["flow_m3h","suction_bar","discharge_bar","bearing_de_c","bearing_nde_c","winding_c","vib_x_mms","vib_y_mms","vib_z_mms","current_a","power_kw","speed_rpm"]`,
		legacyTypes:    `["booster","district","transfer"]`} {
		if err := m.SetExtra(k, v); err != nil {
			t.Fatal(err)
		}
	}
	// For n = 99 and alpha = 1% the split-conformal rank is
	// ceil((n+1)(1-alpha)) = 99, the largest score: 25.
	cal := make([]float64, 99)
	for i := range cal {
		cal[i] = float64(i+1) * 25 / 99
	}
	c, err := alarm.Calibrate(cal, 0.01)
	if err != nil || c.Threshold() != 25 {
		t.Fatalf("calibration: threshold %v, %v", c.Threshold(), err)
	}
	if err := alarm.Put(m, c); err != nil {
		t.Fatal(err)
	}
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	return m
}

func startServer(t testing.TB, path string, opt Options) (*server, *httptest.Server) {
	t.Helper()
	s, err := newServer(path, opt)
	if err != nil {
		t.Fatal(err)
	}
	ts := httptest.NewServer(s.handler())
	t.Cleanup(ts.Close)
	return s, ts
}

func mixedServer(t testing.TB, opt Options) (*server, *httptest.Server, string, []float64) {
	t.Helper()
	path := filepath.Join(t.TempDir(), "model.safetensors")
	_, cal := writeMixed(t, path, 1)
	s, ts := startServer(t, path, opt)
	return s, ts, path, cal
}

func legacyServer(t testing.TB, opt Options) (*server, *httptest.Server, string) {
	t.Helper()
	path := filepath.Join(t.TempDir(), "model.safetensors")
	writeLegacy(t, path, 1)
	s, ts := startServer(t, path, opt)
	return s, ts, path
}

func post(t testing.TB, url, body string) (int, map[string]any) {
	t.Helper()
	resp, err := http.Post(url, "application/json", strings.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	var out map[string]any
	if err := json.NewDecoder(resp.Body).Decode(&out); err != nil {
		t.Fatalf("response is not JSON: %v", err)
	}
	return resp.StatusCode, out
}

// postFirst posts a /score request and returns the first record's
// result, failing the test unless the status is 200.
func postFirst(t testing.TB, url, body string) map[string]any {
	t.Helper()
	code, out := post(t, url, body)
	if code != http.StatusOK {
		t.Fatalf("status %d: %v", code, out)
	}
	return out["scores"].([]any)[0].(map[string]any)
}

// sdkMixed scores standardised mixed records (NaN where missing) with the
// SDK directly, as the calibration was scored: Model.ScoreColumns at
// K = mixedK and seed mixedSeed.
func sdkMixed(t testing.TB, m *vae.Model, x []float64, labels []int, keys []uint64) ([]float64, []float64) {
	t.Helper()
	set, err := dataset.NewMissing(x, len(labels), 5)
	if err == nil {
		set, err = set.WithLabels(labels, 2)
	}
	if err != nil {
		t.Fatal(err)
	}
	scores, contrib, err := m.ScoreColumns(context.Background(), set, vae.ScoreOptions{K: mixedK, Seed: mixedSeed, Keys: keys})
	if err != nil {
		t.Fatal(err)
	}
	return scores, contrib.RawMatrix().Data
}

// near is the tolerance between the server and the SDK: equal on the
// graph path; the lean path (when it serves a model) equals the graphs to
// 1e-5 relative for float32 models.
func near(a, b float64) bool { return math.Abs(a-b) <= 1e-5*(1+math.Abs(b)) }

// TestObjectAndArrayRecords posts one record of the mixed model as an
// object keyed by column name and as an array in column order: both must
// give the SDK's own score and per-column terms (Model.ScoreColumns on
// the standardised record, K and seed from the checkpoint's score.k and
// score.seed) and name the terms by column.
func TestObjectAndArrayRecords(t *testing.T) {
	s, ts, _, _ := mixedServer(t, Options{Seed: 99}) // -seed not set: the checkpoint's
	l := s.cur.Load()
	if l.score != (scoring{K: mixedK, Seed: mixedSeed, From: "checkpoint"}) {
		t.Fatalf("score settings %+v, want the checkpoint's K %d and seed %d", l.score, mixedK, mixedSeed)
	}
	obj := `{"values":{"flow_m3h":150,"vib_x_mms":1.9,"temp_c":44,"mode":"high","starts":2},"label":"district","key":7,"columns":true}`
	arr := `{"values":[150,1.9,44,"high",2],"label":1,"key":7,"columns":true}`
	a, b := postFirst(t, ts.URL+"/score", obj), postFirst(t, ts.URL+"/score", arr)
	// (150-120)/30, (1.9-1.6)/0.3, (44-45)/3; mode "high" is category 2.
	x := []float64{1, (1.9 - 1.6) / 0.3, -1.0 / 3, 2, 2}
	want, terms := sdkMixed(t, l.model, x, []int{1}, []uint64{7})
	for _, got := range []map[string]any{a, b} {
		if !near(got["score"].(float64), want[0]) {
			t.Fatalf("served %v, SDK %v", got["score"], want[0])
		}
		gc := got["columns"].(map[string]any)
		if len(gc) != 5 {
			t.Fatalf("columns %v", gc)
		}
		for j, c := range mixedSchema.Columns {
			if !near(gc[c.Name].(float64), terms[j]) {
				t.Errorf("column %s: served %v, SDK %v", c.Name, gc[c.Name], terms[j])
			}
		}
		if got["observed"].(float64) != 5 {
			t.Errorf("observed %v, want 5", got["observed"])
		}
	}
	if a["score"] != b["score"] {
		t.Errorf("object %v and array %v of the same record score differently", a["score"], b["score"])
	}
}

// TestMissingValues checks that null and absent columns are missing
// values for a losses.Columns model (scored over the observed entries, as
// the SDK scores NaN entries, with a zero term), and a 400 naming the
// column for a model whose likelihood needs every column.
func TestMissingValues(t *testing.T) {
	s, ts, _, _ := mixedServer(t, Options{})
	m := s.cur.Load().model
	a := postFirst(t, ts.URL+"/score", `{"values":[150,null,44,"normal",null],"label":"booster","key":3,"columns":true}`)
	b := postFirst(t, ts.URL+"/score", `{"values":{"flow_m3h":150,"temp_c":44,"mode":"normal"},"label":"booster","key":3}`)
	nan := math.NaN()
	want, terms := sdkMixed(t, m, []float64{1, nan, -1.0 / 3, 1, nan}, []int{0}, []uint64{3})
	if !near(a["score"].(float64), want[0]) || a["score"] != b["score"] {
		t.Fatalf("scores with missing values: array %v, object %v, SDK %v", a["score"], b["score"], want[0])
	}
	if a["observed"].(float64) != 3 || b["observed"].(float64) != 3 {
		t.Errorf("observed %v and %v, want 3", a["observed"], b["observed"])
	}
	gc := a["columns"].(map[string]any)
	if gc["vib_x_mms"].(float64) != 0 || gc["starts"].(float64) != 0 || terms[1] != 0 || !near(gc["flow_m3h"].(float64), terms[0]) {
		t.Errorf("terms %v, SDK %v: a missing column's term is 0", gc, terms)
	}
	// The full record scores differently: the missing columns count.
	full := postFirst(t, ts.URL+"/score", `{"values":[150,1.6,44,"normal",0],"label":"booster","key":3}`)
	if full["score"] == a["score"] {
		t.Errorf("the full record scores %v, like the one with two missing values", full["score"])
	}
	code, out := post(t, ts.URL+"/score", `{"values":[null,null,null,null,null],"label":0}`)
	if code != 400 || out["kind"] != "missing" {
		t.Errorf("all missing: %d %v", code, out)
	}

	_, lts, _ := legacyServer(t, Options{})
	code, out = post(t, lts.URL+"/score", `{"values":[125,2.1,6.9,46,44,71,null,1.5,1.0,62,31,2955],"label":"booster"}`)
	if code != 400 || out["kind"] != "missing" || !strings.Contains(out["error"].(string), `column "vib_x_mms": missing`) {
		t.Errorf("a missing value for an all-Gaussian model: %d %v", code, out)
	}
	code, out = post(t, lts.URL+"/score", `{"values":{"flow_m3h":125},"label":"booster"}`)
	if code != 400 || out["kind"] != "missing" || !strings.Contains(out["error"].(string), `column "suction_bar": missing`) {
		t.Errorf("absent columns for an all-Gaussian model: %d %v", code, out)
	}
}

// TestCalibrationPValues checks each record's p-value and flag against
// the split-conformal formulas computed here from the calibration scores:
// p(s) = (1 + #{i: s_i >= s}) / (n + 1) (Bates, Candes, Lei, Romano and
// Sesia 2023), and the flag s > the k-th smallest score, k = ceil((n+1)
// (1 - alpha)) (Angelopoulos and Bates 2021).
func TestCalibrationPValues(t *testing.T) {
	_, ts, _, cal := mixedServer(t, Options{})
	sorted := slices.Sorted(slices.Values(cal))
	n := len(cal)
	threshold := sorted[int(math.Ceil(float64(n+1)*(1-mixedAlpha)))-1]
	var recs []string
	for i := range 40 {
		v := float64(i) / 4 // from typical to far off
		recs = append(recs, fmt.Sprintf(`{"values":[%v,%v,%v,"low",%d],"label":%d,"key":%d}`, 120+30*v, 1.6-0.3*v, 45+3*v, i%3, i%2, i))
	}
	code, out := post(t, ts.URL+"/score", `{"records":[`+strings.Join(recs, ",")+`]}`)
	if code != 200 {
		t.Fatalf("status %d: %v", code, out)
	}
	if out["threshold"].(float64) != threshold {
		t.Fatalf("threshold %v, want %v", out["threshold"], threshold)
	}
	flagged, small := 0, 0
	for i, r := range out["scores"].([]any) {
		r := r.(map[string]any)
		s := r["score"].(float64)
		ge := 0
		for _, c := range cal {
			if c >= s {
				ge++
			}
		}
		if p := float64(1+ge) / float64(n+1); r["p_value"].(float64) != p {
			t.Errorf("record %d: score %v, p-value %v, want %v", i, s, r["p_value"], p)
		}
		if r["flagged"].(bool) != (s > threshold) {
			t.Errorf("record %d: score %v, threshold %v, flagged %v", i, s, threshold, r["flagged"])
		}
		if r["flagged"].(bool) {
			flagged++
		}
		if r["p_value"].(float64) < 0.5 {
			small++
		}
	}
	// The records span both sides of the threshold, so the checks above
	// see both answers.
	if flagged == 0 || flagged == 40 || small == 0 {
		t.Fatalf("%d of 40 records flagged, %d p-values below 0.5: the test records do not span the calibration", flagged, small)
	}
}

// TestScoreSettings checks that the server scores with the checkpoint's
// K and refuses a conflicting -k or -mean, and that a checkpoint without
// score settings takes the flags.
func TestScoreSettings(t *testing.T) {
	path := filepath.Join(t.TempDir(), "model.safetensors")
	writeMixed(t, path, 1)
	if _, err := newServer(path, Options{K: mixedK + 1}); err == nil || !strings.Contains(err.Error(), "-k 4 conflicts") || !strings.Contains(err.Error(), "K = 3") {
		t.Errorf("-k %d against score.k %d: %v", mixedK+1, mixedK, err)
	}
	if _, err := newServer(path, Options{Mean: true}); err == nil || !strings.Contains(err.Error(), "-mean=true conflicts") {
		t.Errorf("-mean against a sampled calibration: %v", err)
	}
	s, err := newServer(path, Options{K: mixedK, Seed: 8, SeedSet: true})
	if err != nil {
		t.Fatal(err)
	}
	if got := s.cur.Load().score; got != (scoring{K: mixedK, Seed: 8, From: "checkpoint"}) {
		t.Errorf("explicit seed: %+v", got)
	}
	lpath := filepath.Join(t.TempDir(), "model.safetensors")
	writeLegacy(t, lpath, 1)
	s, err = newServer(lpath, Options{K: 4, Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	if got := s.cur.Load().score; got != (scoring{K: 4, Seed: 2, From: "flag"}) {
		t.Errorf("no score settings in the checkpoint: %+v", got)
	}
}

// TestLegacyCheckpoint serves a checkpoint of the first telemetry example
// (telemetry.* metadata, all-real sensors): the score is the SDK's for the
// standardised record, with per-sensor terms.
func TestLegacyCheckpoint(t *testing.T) {
	for _, k := range []int{1, 4} {
		s, ts, _ := legacyServer(t, Options{K: k, Seed: 3})
		got := postFirst(t, ts.URL+"/score", `{"values":`+legacyValues+`,"label":"district","key":99,"columns":true}`)
		var x []float64
		_ = json.Unmarshal([]byte(legacyValues), &x)
		for j := range x {
			x[j] = (x[j] - legacyStd.Mean[j]) / legacyStd.Std[j]
		}
		sc, err := s.cur.Load().model.NewScorer(vae.ScorerOptions{K: k, Seed: 3})
		if err != nil {
			t.Fatal(err)
		}
		want, cols := make([]float64, 1), make([]float64, 12)
		if err := sc.Score(context.Background(), want, vae.Records{X: x, Labels: []int{1}, Keys: []uint64{99}}, cols); err != nil {
			t.Fatal(err)
		}
		if !near(got["score"].(float64), want[0]) {
			t.Fatalf("K=%d: served %v, SDK %v", k, got["score"], want[0])
		}
		if f := got["flagged"].(bool); f != (want[0] > 25) {
			t.Fatalf("flagged %v for score %v and threshold 25", f, want[0])
		}
		gc := got["columns"].(map[string]any)
		if !near(gc["flow_m3h"].(float64), cols[0]) || !near(gc["speed_rpm"].(float64), cols[11]) || len(gc) != 12 {
			t.Fatalf("columns %v, want %v", gc, cols)
		}
		if _, ok := got["observed"]; ok {
			t.Errorf("observed reported for a model without missing values: %v", got)
		}
	}
}

// TestScoreMany checks a batch: labels by name and index, keys, and that a
// record's score does not depend on its company when it has a key.
func TestScoreMany(t *testing.T) {
	_, ts, _, _ := mixedServer(t, Options{})
	rec := `{"values":[150,1.9,44,"high",2],"label":"district","key":6}`
	code, out := post(t, ts.URL+"/score", `{"records":[{"values":[100,1.2,40,"low",0],"label":0,"key":5},`+rec+`]}`)
	if code != http.StatusOK || len(out["scores"].([]any)) != 2 {
		t.Fatalf("status %d: %v", code, out)
	}
	alone := postFirst(t, ts.URL+"/score", rec)
	if a, b := alone["score"], out["scores"].([]any)[1].(map[string]any)["score"]; a != b {
		t.Fatalf("record with key 6 alone %v, in a batch %v", a, b)
	}
}

// TestBadRequests checks every rejected request: its status, its error
// kind and that the message names the problem.
func TestBadRequests(t *testing.T) {
	_, ts, _, _ := mixedServer(t, Options{MaxBody: 4096, MaxRecords: 3})
	good := `[150,1.9,44,"high",2]`
	rec := func(values, label string) string { return `{"values":` + values + `,"label":` + label + `}` }
	cases := []struct {
		name, body string
		code       int
		kind, word string
	}{
		{"malformed", `{"values":[1,2`, 400, "malformed_json", "malformed JSON"},
		{"unknown field", `{"vals":[1]}`, 400, "malformed_json", "vals"},
		{"two values", rec(good, `"booster"`) + `{}`, 400, "malformed_json", "more than one"},
		{"no record", `{}`, 400, "malformed_json", "values"},
		{"record and records", `{"values":` + good + `,"records":[]}`, 400, "malformed_json", "not both"},
		{"values not a record", rec(`7`, `0`), 400, "malformed_json", "array in column order or an object"},
		{"wrong count", `{"records":[` + rec(good, `0`) + `,` + rec("[1,2,3]", `0`) + `]}`, 400, "feature_count", "record 1: 3 values, the model wants 5 (flow_m3h, vib_x_mms, temp_c, mode, starts"},
		{"unknown column", rec(`{"flow_m3h":1,"vibx":2}`, `0`), 400, "unknown_column", `record 0: unknown column "vibx" (the model's columns: flow_m3h, vib_x_mms, temp_c, mode, starts)`},
		{"unknown category", rec(`{"flow_m3h":1,"mode":"turbo"}`, `0`), 400, "category", `column "mode": unknown category "turbo" (want one of "low", "normal", "high")`},
		{"category index out of range", rec(`[150,1.9,44,3,2]`, `0`), 400, "category", `column "mode": 3 is not a category`},
		{"string for a real column", rec(`{"temp_c":"hot"}`, `0`), 400, "bad_value", `column "temp_c": "hot": a real column takes a number`},
		{"bool for a real column", rec(`[150,true,44,"high",2]`, `0`), 400, "bad_value", `column "vib_x_mms": true`},
		{"count not a count", rec(`[150,1.9,44,"high",2.5]`, `0`), 400, "bad_value", `column "starts": 2.5 is not a count`},
		{"number too big for float64", rec(`[1e999,1.9,44,"high",2]`, `0`), 400, "non_finite", `column "flow_m3h": 1e999 is out of range`},
		{"overflows float32", rec(`[150,1.9,1e300,"high",2]`, `0`), 400, "non_finite", `column "temp_c": 1e+300 is out of range`},
		{"unknown label", rec(good, `"pumpkin"`), 400, "label", `unknown label "pumpkin" (want one of "booster", "district" or 0..1)`},
		{"label index", rec(good, `7`), 400, "label", "unknown label 7"},
		{"missing label", `{"values":` + good + `}`, 400, "label", "no label"},
		{"keys on some records", `{"records":[{"values":` + good + `,"label":0,"key":1},` + rec(good, `0`) + `]}`, 400, "key", "record 1 has no key"},
		{"too many records", `{"records":[` + strings.Repeat(rec(good, `0`)+",", 3) + rec(good, `0`) + `]}`, 413, "too_many_records", "at most 3"},
		{"too large", `{"values":[` + strings.Repeat("1,", 3000) + `1]}`, 413, "too_large", "4096 bytes"},
	}
	for _, tc := range cases {
		code, out := post(t, ts.URL+"/score", tc.body)
		if code != tc.code || out["kind"] != tc.kind || !strings.Contains(fmt.Sprint(out["error"]), tc.word) {
			t.Errorf("%s: status %d, %v; want %d, kind %s, naming %q", tc.name, code, out, tc.code, tc.kind, tc.word)
		}
	}
	resp, err := http.Get(ts.URL + "/score")
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusMethodNotAllowed {
		t.Errorf("GET /score: status %d, want 405", resp.StatusCode)
	}
	// The metrics count the rejections by kind.
	body := get(t, ts.URL+"/metrics")
	for _, want := range []string{`scoreserver_errors_total{kind="label"} 3`, `scoreserver_errors_total{kind="too_large"} 1`,
		`scoreserver_errors_total{kind="category"} 2`, `scoreserver_requests_total{code="400",path="/score"}`, "scoreserver_request_duration_seconds_bucket"} {
		if !strings.Contains(body, want) {
			t.Errorf("metrics lack %q", want)
		}
	}
}

func get(t testing.TB, url string) string {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("GET %s: status %d: %s", url, resp.StatusCode, b)
	}
	return string(b)
}

func health(t testing.TB, url string) Health {
	t.Helper()
	var h Health
	if err := json.Unmarshal([]byte(get(t, url+"/healthz")), &h); err != nil {
		t.Fatal(err)
	}
	return h
}

// TestHealthAndMetrics checks /healthz against the checkpoint written and
// that its example record is accepted, and the metrics of one request.
func TestHealthAndMetrics(t *testing.T) {
	_, ts, path, _ := mixedServer(t, Options{})
	h := health(t, ts.URL)
	if h.Status != "ok" || h.Model != path || len(h.Columns) != 5 || h.Columns[3].Kind != "categorical" || !slices.Equal(h.Columns[3].Categories, []string{"low", "normal", "high"}) ||
		h.Columns[0].Mean != 120 || h.Columns[0].Std != 30 || !slices.Equal(h.Labels, []string{"booster", "district"}) || !h.Missing ||
		h.Calibration == nil || h.Calibration.N != mixedCal || h.Score.K != mixedK || h.Lean != (h.Why == "") {
		t.Fatalf("health %+v", h)
	}
	body, _ := json.Marshal(map[string]any{"values": h.Example, "label": h.Labels[0]})
	postFirst(t, ts.URL+"/score", string(body))
	m := get(t, ts.URL+"/metrics")
	for _, want := range []string{`scoreserver_requests_total{code="200",path="/score"} 1`, "scoreserver_score_nats_count 1",
		"scoreserver_records_total 1", "scoreserver_flagged_total"} {
		if !strings.Contains(m, want) {
			t.Errorf("metrics lack %q:\n%s", want, m)
		}
	}
	// The legacy all-Gaussian model runs on the lean Scorer.
	_, lts, _ := legacyServer(t, Options{})
	if h := health(t, lts.URL); !h.Lean || len(h.Columns) != 12 || h.Columns[11].Name != "speed_rpm" || h.Missing {
		t.Fatalf("legacy health %+v", h)
	}
}

// TestReloadSwapsCheckpoint replaces the served file with a checkpoint of
// another kind (all-real legacy -> mixed columns) while 8 goroutines
// score: no request may fail, after the reload the new columns are
// served and scored as the SDK scores them, and a corrupt file leaves the
// last good model serving.
func TestReloadSwapsCheckpoint(t *testing.T) {
	s, ts, path := legacyServer(t, Options{})
	legacy := `{"values":` + legacyValues + `,"label":"booster","key":1}`
	mixed := `{"values":{"flow_m3h":150,"vib_x_mms":1.9,"temp_c":44,"mode":"high","starts":2},"label":"district","key":7}`
	stop := make(chan struct{})
	var wg sync.WaitGroup
	var failures sync.Map
	for g := 0; g < 8; g++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				select {
				case <-stop:
					return
				default:
				}
				// Whichever model serves, one of the two records fits it.
				for _, body := range []string{legacy, mixed} {
					resp, err := http.Post(ts.URL+"/score", "application/json", strings.NewReader(body))
					if err != nil {
						failures.Store(err.Error(), true)
						return
					}
					_, _ = io.Copy(io.Discard, resp.Body)
					resp.Body.Close()
					if resp.StatusCode >= 500 {
						failures.Store(resp.Status, true)
					}
				}
			}
		}()
	}
	if code, out := post(t, ts.URL+"/score", mixed); code != 400 {
		t.Fatalf("a mixed record before the swap: %d %v", code, out)
	}
	m, _ := writeMixed(t, path, 2)
	if err := s.reload(); err != nil {
		t.Fatal(err)
	}
	if h := health(t, ts.URL); len(h.Columns) != 5 || h.Columns[3].Name != "mode" || h.Score.K != mixedK {
		t.Fatalf("after the swap: %+v", h)
	}
	got := postFirst(t, ts.URL+"/score", mixed)
	want, _ := sdkMixed(t, m, []float64{1, (1.9 - 1.6) / 0.3, -1.0 / 3, 2, 2}, []int{1}, []uint64{7})
	if !near(got["score"].(float64), want[0]) {
		t.Fatalf("after the swap: served %v, the new model's %v", got["score"], want[0])
	}
	if code, out := post(t, ts.URL+"/score", legacy); code != 400 || out["kind"] != "feature_count" {
		t.Fatalf("a legacy record after the swap: %d %v", code, out)
	}
	if err := os.WriteFile(path, []byte("not a checkpoint"), 0o644); err != nil {
		t.Fatal(err)
	}
	code, out := post(t, ts.URL+"/reload", "")
	if code != http.StatusInternalServerError || out["kind"] != "reload" {
		t.Fatalf("reload of a corrupt file: %d %v", code, out)
	}
	if again := postFirst(t, ts.URL+"/score", mixed); again["score"] != got["score"] {
		t.Fatalf("after a failed reload the score is %v, want the last good model's %v", again["score"], got["score"])
	}
	close(stop)
	wg.Wait()
	failures.Range(func(k, _ any) bool {
		t.Errorf("a request failed during the reloads: %v", k)
		return true
	})
	m2 := get(t, ts.URL+"/metrics")
	if !strings.Contains(m2, `scoreserver_reloads_total{result="failed"} 1`) || !strings.Contains(m2, `scoreserver_reloads_total{result="ok"} 1`) {
		t.Error("the reloads are not counted")
	}
}

// TestServeShutdown runs the command's serve loop on a loopback port,
// scores once and cancels: serve must return without error.
func TestServeShutdown(t *testing.T) {
	path := filepath.Join(t.TempDir(), "model.safetensors")
	writeMixed(t, path, 1)
	cfg := defaultConfig()
	cfg.Addr, cfg.Model = "127.0.0.1:0", path
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan string, 1)
	done := make(chan error, 1)
	go func() { done <- serve(ctx, cfg, testLogger(), ready) }()
	addr := <-ready
	postFirst(t, "http://"+addr+"/score", `{"values":[150,1.9,44,"high",2],"label":"booster"}`)
	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Fatalf("serve: %v", err)
		}
	case <-time.After(20 * time.Second):
		t.Fatal("serve did not return after cancellation")
	}
}

// TestDemoModel trains the demo model on a tiny invented fleet and serves
// it: the path the README's one command takes. It must be the telemetry
// example's kind of model (mixed columns, station types, missing values)
// with its calibration and score settings.
func TestDemoModel(t *testing.T) {
	if testing.Short() {
		t.Skip("trains a model")
	}
	path, err := trainDemo(context.Background(), t.TempDir(), 1, 1, 2,
		fleetSize{Stations: 3, HistoryDays: 4, ValDays: 1, CalDays: 1, Interval: 30 * time.Minute, Missing: 0.05, Hidden: []int{16}})
	if err != nil {
		t.Fatal(err)
	}
	s, ts := startServer(t, path, Options{})
	l := s.cur.Load()
	if l.cal == nil || len(l.labels) != 3 || len(l.cols) != 14 || l.cols[12].Name != "mode" || !l.missingOK() || !l.scaled || l.score != (scoring{K: 2, Seed: 1, From: "checkpoint"}) {
		t.Fatalf("demo checkpoint: calibration %v, labels %v, columns %v, missing %v, score %+v", l.cal, l.labels, l.cols, l.missingOK(), l.score)
	}
	got := postFirst(t, ts.URL+"/score", `{"values":{"flow_m3h":300,"mode":"normal","starts":0},"label":"booster","columns":true}`)
	if got["observed"].(float64) != 3 || len(got["columns"].(map[string]any)) != 14 {
		t.Fatalf("demo score %v", got)
	}
}

func TestFlags(t *testing.T) {
	var out bytes.Buffer
	if _, err := parseFlags([]string{"-h"}, &out); !errors.Is(err, flag.ErrHelp) || !strings.Contains(out.String(), "POST /score") {
		t.Fatalf("-h: %v\n%s", err, out.String())
	}
	for _, args := range [][]string{{"-k", "-1"}, {"-epochs", "0"}, {"-max-body", "0"}, {"stray"}, {"-mean", "-k", "4"}} {
		if _, err := parseFlags(args, io.Discard); err == nil {
			t.Errorf("%v accepted", args)
		}
	}
	cfg, err := parseFlags([]string{"-addr", "127.0.0.1:0", "-k", "8", "-seed", "4"}, io.Discard)
	if err != nil || cfg.K != 8 || cfg.Seed != 4 || !cfg.SeedSet {
		t.Fatalf("%+v, %v", cfg, err)
	}
	if cfg, err := parseFlags(nil, io.Discard); err != nil || cfg.K != 0 || cfg.SeedSet {
		t.Fatalf("defaults: %+v, %v", cfg, err)
	}
}

// BenchmarkServeLoopback posts single-record requests to a server on the
// loopback interface from GOMAXPROCS goroutines and reports requests/s
// and the latency percentiles seen by the clients: sub-benchmarks for the
// mixed model (served as its calibration was scored, K = 3) and the
// all-Gaussian legacy model (K = 1, the lean Scorer).
func BenchmarkServeLoopback(b *testing.B) {
	b.Run("mixed", func(b *testing.B) {
		_, ts, _, _ := mixedServer(b, Options{})
		benchServe(b, ts.URL, `{"values":{"flow_m3h":150,"vib_x_mms":1.9,"temp_c":44,"mode":"high","starts":2},"label":"district"}`)
	})
	b.Run("legacy", func(b *testing.B) {
		_, ts, _ := legacyServer(b, Options{K: 1, Seed: 1})
		benchServe(b, ts.URL, `{"values":`+legacyValues+`,"label":"booster"}`)
	})
}

func benchServe(b *testing.B, url, record string) {
	body := []byte(record)
	var mu sync.Mutex
	lat := make([]time.Duration, 0, b.N)
	client := &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: 64}}
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		var mine []time.Duration
		for pb.Next() {
			t0 := time.Now()
			resp, err := client.Post(url+"/score", "application/json", bytes.NewReader(body))
			if err != nil {
				b.Error(err)
				return
			}
			_, _ = io.Copy(io.Discard, resp.Body)
			resp.Body.Close()
			if resp.StatusCode != http.StatusOK {
				b.Errorf("status %d", resp.StatusCode)
				return
			}
			mine = append(mine, time.Since(t0))
		}
		mu.Lock()
		lat = append(lat, mine...)
		mu.Unlock()
	})
	b.StopTimer()
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "requests/s")
	slices.Sort(lat)
	if len(lat) > 0 {
		b.ReportMetric(float64(lat[len(lat)/2].Microseconds()), "p50-us")
		b.ReportMetric(float64(lat[len(lat)*99/100].Microseconds()), "p99-us")
	}
}

func testLogger() *slog.Logger { return slog.New(slog.NewTextHandler(io.Discard, nil)) }

// TestTelemetryCheckpointKeys serves a mixed checkpoint that also carries
// the telemetry example's older keys, stale for this model (12 sensor
// names and standardisations for 5 columns, as the telemetry example
// writes them beside its schema): the schema and standardizer win, and
// the class names come from telemetry.station_types when "labels" is
// absent. Loading such a checkpoint failed with "metadata
// telemetry.features: want 14 names" before the server read the schema.
func TestTelemetryCheckpointKeys(t *testing.T) {
	path := filepath.Join(t.TempDir(), "model.safetensors")
	writeMixed(t, path, 1)
	m, err := vae.Load(path)
	if err != nil {
		t.Fatal(err)
	}
	z, _ := json.Marshal(legacyStd)
	for k, v := range map[string]string{legacyStandardizer: string(z), legacyTypes: `["booster","district"]`, extraLabels: "",
		legacyFeatures: `["flow_m3h","suction_bar","discharge_bar","bearing_de_c","bearing_nde_c","winding_c","vib_x_mms","vib_y_mms","vib_z_mms","current_a","power_kw","speed_rpm"]`} {
		if err := m.SetExtra(k, v); err != nil {
			t.Fatal(err)
		}
	}
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	_, ts := startServer(t, path, Options{})
	h := health(t, ts.URL)
	if len(h.Columns) != 5 || h.Columns[4].Name != "starts" || h.Columns[0].Mean != 120 || !slices.Equal(h.Labels, []string{"booster", "district"}) {
		t.Fatalf("health %+v", h)
	}
	got := postFirst(t, ts.URL+"/score", `{"values":{"flow_m3h":150,"vib_x_mms":1.9,"temp_c":44,"mode":"high","starts":2},"label":"district","key":7}`)
	want, _ := sdkMixed(t, m, []float64{1, (1.9 - 1.6) / 0.3, -1.0 / 3, 2, 2}, []int{1}, []uint64{7})
	if !near(got["score"].(float64), want[0]) {
		t.Fatalf("served %v, SDK %v", got["score"], want[0])
	}
}

// TestResolveScoring checks the choice of K, seed and mean score from the
// checkpoint's metadata and the flags, case by case.
func TestResolveScoring(t *testing.T) {
	rec := map[string]string{extraScoreK: "4", extraScoreSeed: "7"}
	cases := []struct {
		name       string
		extra      map[string]string
		calibrated bool
		opt        Options
		want       scoring
		err        string
	}{
		{"nothing recorded, no flags", nil, true, Options{Seed: 1}, scoring{K: 1, Seed: 1, From: "default"}, ""},
		{"nothing recorded, -k", nil, true, Options{K: 3, Seed: 1}, scoring{K: 3, Seed: 1, From: "flag"}, ""},
		{"recorded, no flags", rec, true, Options{Seed: 1}, scoring{K: 4, Seed: 7, From: "checkpoint"}, ""},
		{"recorded, the same -k and -seed", rec, true, Options{K: 4, Seed: 2, SeedSet: true}, scoring{K: 4, Seed: 2, From: "checkpoint"}, ""},
		{"recorded, another -k", rec, true, Options{K: 2}, scoring{}, "-k 2 conflicts with the checkpoint: its alarm calibration was scored with K = 4"},
		{"recorded, -mean", rec, true, Options{Mean: true}, scoring{}, "-mean=true conflicts"},
		{"recorded mean, no -mean", map[string]string{extraScoreK: "1", extraScoreMean: "true"}, true, Options{}, scoring{}, "-mean=false conflicts"},
		{"recorded mean, -mean", map[string]string{extraScoreK: "1", extraScoreMean: "true"}, true, Options{Mean: true}, scoring{K: 1, Mean: true, From: "checkpoint"}, ""},
		{"recorded without calibration, -k", rec, false, Options{K: 2}, scoring{K: 2, Seed: 7, From: "flag"}, ""},
		{"recorded without calibration, -mean", rec, false, Options{Mean: true}, scoring{K: 1, Seed: 7, Mean: true, From: "flag"}, ""},
		{"recorded without calibration, no flags", rec, false, Options{}, scoring{K: 4, Seed: 7, From: "checkpoint"}, ""},
		{"malformed K", map[string]string{extraScoreK: "many"}, true, Options{}, scoring{}, `score.k: "many" is not a K`},
		{"malformed seed", map[string]string{extraScoreSeed: "-1"}, true, Options{}, scoring{}, `score.seed: "-1" is not a seed`},
		{"-mean with -k", nil, false, Options{K: 3, Mean: true}, scoring{}, "-mean scores at the posterior mean; K = 3"},
	}
	for _, tc := range cases {
		got, err := resolveScoring(tc.extra, tc.calibrated, tc.opt)
		if tc.err != "" {
			if err == nil || !strings.Contains(err.Error(), tc.err) {
				t.Errorf("%s: %+v, %v; want an error naming %q", tc.name, got, err, tc.err)
			}
			continue
		}
		if err != nil || got != tc.want {
			t.Errorf("%s: %+v, %v; want %+v", tc.name, got, err, tc.want)
		}
	}
}
