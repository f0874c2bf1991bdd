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
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"slices"

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

var testStd = dataset.Standardizer{
	Mean: []float64{120, 2.2, 6.6, 45, 44, 70, 1.6, 1.6, 1.1, 60, 30, 2960},
	Std:  []float64{30, 0.3, 0.8, 3, 3, 5, 0.3, 0.3, 0.2, 10, 6, 40},
}

// writeCheckpoint saves an (untrained) telemetry-shaped model with the
// telemetry metadata to path.
func writeCheckpoint(t testing.TB, path string, seed uint64) *vae.Model {
	t.Helper()
	lik, err := losses.NewLearnedGaussian("likelihood", 12, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: 12, Hidden: []int{16}, Latent: 4, Classes: 3, Likelihood: lik, Seed: seed})
	if err != nil {
		t.Fatal(err)
	}
	z, _ := json.Marshal(testStd)
	for k, v := range map[string]string{extraStandardizer: string(z),
		extraFeatures: `["flow_m3h","suction_bar","discharge_bar","bearing_de_c","bearing_nde_c","winding_c","vib_x_mms","vib_y_mms","vib_z_mms","current_a","power_kw","speed_rpm"]`,
		extraTypes:    `["booster","district","transfer"]`} {
		if err := m.SetExtra(k, v); err != nil {
			t.Fatal(err)
		}
	}
	// A calibration whose threshold is 25: for n = 99 and alpha = 1% the
	// split-conformal rank is ceil((n+1)(1-alpha)) = 99, the largest score.
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

func testServer(t testing.TB, opt Options) (*server, *httptest.Server, string) {
	t.Helper()
	path := filepath.Join(t.TempDir(), "model.safetensors")
	writeCheckpoint(t, path, 1)
	s, err := newServer(path, opt)
	if err != nil {
		t.Fatal(err)
	}
	ts := httptest.NewServer(s.handler())
	t.Cleanup(ts.Close)
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

const goodValues = "[125,2.1,6.9,46,44,71,1.7,1.5,1.0,62,31,2955]"

// standardised returns the record of goodValues as the model sees it.
func standardised() []float64 {
	var v []float64
	_ = json.Unmarshal([]byte(goodValues), &v)
	for j := range v {
		v[j] = (v[j] - testStd.Mean[j]) / testStd.Std[j]
	}
	return v
}

// TestScoreMatchesSDK checks that a served score is the SDK's own for the
// standardised record, label and key (K = 1 and K = 4), and that the
// per-feature terms are the Scorer's.
func TestScoreMatchesSDK(t *testing.T) {
	for _, k := range []int{1, 4} {
		s, ts, _ := testServer(t, Options{K: k, Seed: 3})
		code, out := post(t, ts.URL+"/score", `{"values":`+goodValues+`,"label":"district","key":99,"columns":true}`)
		if code != http.StatusOK {
			t.Fatalf("status %d: %v", code, out)
		}
		m := s.cur.Load().model
		sc, err := m.NewScorer(vae.ScorerOptions{K: k, Seed: 3})
		if err != nil {
			t.Fatal(err)
		}
		want, cols := make([]float64, 1), make([]float64, 12)
		if err := sc.Score(context.Background(), want, vae.Records{X: standardised(), Labels: []int{1}, Keys: []uint64{99}}, cols); err != nil {
			t.Fatal(err)
		}
		got := out["scores"].([]any)[0].(map[string]any)
		if got["score"].(float64) != want[0] {
			t.Fatalf("K=%d: served %v, SDK %v", k, got["score"], want[0])
		}
		if f := got["flagged"].(bool); f != (want[0] > 25) {
			t.Fatalf("flagged %v for score %v and threshold 25", f, want[0])
		}
		gc := got["columns"].(map[string]any)
		if gc["flow_m3h"].(float64) != cols[0] || gc["speed_rpm"].(float64) != cols[11] || len(gc) != 12 {
			t.Fatalf("columns %v, want %v", gc, cols)
		}
	}
}

// TestScoreMany checks a batch: labels by name and index, keys, and that a
// record's score does not depend on its company when it has a key.
func TestScoreMany(t *testing.T) {
	_, ts, _ := testServer(t, Options{K: 2, Seed: 1})
	code, out := post(t, ts.URL+"/score", `{"records":[{"values":`+goodValues+`,"label":0,"key":5},{"values":`+goodValues+`,"label":"transfer","key":6}]}`)
	if code != http.StatusOK {
		t.Fatalf("status %d: %v", code, out)
	}
	scores := out["scores"].([]any)
	if len(scores) != 2 {
		t.Fatalf("%d scores, want 2", len(scores))
	}
	_, alone := post(t, ts.URL+"/score", `{"values":`+goodValues+`,"label":"transfer","key":6}`)
	if a, b := alone["scores"].([]any)[0].(map[string]any)["score"], scores[1].(map[string]any)["score"]; a != b {
		t.Fatalf("record with key 6 alone %v, in a batch %v", a, b)
	}
}

// TestBadRequests checks every rejected request: its status, its error
// kind and that the message names the problem.
func TestBadRequests(t *testing.T) {
	_, ts, _ := testServer(t, Options{MaxBody: 4096, MaxRecords: 3})
	rec := func(values, label string) string { return `{"values":` + values + `,"label":` + label + `}` }
	cases := []struct {
		name, body string
		code       int
		kind, word string
	}{
		{"malformed", `{"values":[1,2`, 400, "malformed_json", "malformed JSON"},
		{"unknown field", `{"vals":[1]}`, 400, "malformed_json", "vals"},
		{"two values", rec(goodValues, `"booster"`) + `{}`, 400, "malformed_json", "more than one"},
		{"no record", `{}`, 400, "malformed_json", "values"},
		{"wrong count", `{"records":[` + rec(goodValues, `0`) + `,` + rec("[1,2,3]", `0`) + `]}`, 400, "feature_count", "record 1: 3 values, the model wants 12"},
		{"number too big for JSON", rec("[1e999,2.1,6.9,46,44,71,1.7,1.5,1.0,62,31,2955]", `0`), 400, "malformed_json", "1e999"},
		{"overflows float32", rec("[125,2.1,6.9,46,44,71,1.7,1.5,1.0,62,31,1e300]", `0`), 400, "non_finite", "feature 11 (speed_rpm)"},
		{"unknown label", rec(goodValues, `"pumpkin"`), 400, "label", `unknown label "pumpkin"`},
		{"label index", rec(goodValues, `7`), 400, "label", "unknown label 7"},
		{"missing label", `{"values":` + goodValues + `}`, 400, "label", "no label"},
		{"keys on some records", `{"records":[{"values":` + goodValues + `,"label":0,"key":1},` + rec(goodValues, `0`) + `]}`, 400, "key", "record 1 has no key"},
		{"too many records", `{"records":[` + strings.Repeat(rec(goodValues, `0`)+",", 3) + rec(goodValues, `0`) + `]}`, 413, "too_many_records", "at most 3"},
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
		`scoreserver_requests_total{code="400",path="/score"}`, "scoreserver_request_duration_seconds_bucket"} {
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

func TestHealthAndMetrics(t *testing.T) {
	_, ts, path := testServer(t, Options{})
	var h Health
	if err := json.Unmarshal([]byte(get(t, ts.URL+"/healthz")), &h); err != nil {
		t.Fatal(err)
	}
	if h.Status != "ok" || h.Model != path || len(h.Features) != 12 || len(h.Labels) != 3 || !h.Lean || !slices.Equal(h.Means, testStd.Mean) {
		t.Fatalf("health %+v", h)
	}
	post(t, ts.URL+"/score", `{"values":`+goodValues+`,"label":"booster"}`)
	body := get(t, ts.URL+"/metrics")
	for _, want := range []string{`scoreserver_requests_total{code="200",path="/score"} 1`, "scoreserver_score_nats_count 1",
		"scoreserver_records_total 1"} {
		if !strings.Contains(body, want) {
			t.Errorf("metrics lack %q:\n%s", want, body)
		}
	}
}

// TestReloadUnderLoad swaps checkpoints while 8 goroutines score: no
// request may fail, a good file changes the scores, and a corrupt one
// leaves the last good model serving.
func TestReloadUnderLoad(t *testing.T) {
	s, ts, path := testServer(t, Options{Seed: 2})
	body := `{"values":` + goodValues + `,"label":"booster","key":1}`
	score := func() float64 {
		_, out := post(t, ts.URL+"/score", body)
		return out["scores"].([]any)[0].(map[string]any)["score"].(float64)
	}
	before := score()
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
				resp, err := http.Post(ts.URL+"/score", "application/json", strings.NewReader(body))
				if err != nil {
					failures.Store(err.Error(), true)
					return
				}
				_, _ = io.Copy(io.Discard, resp.Body)
				resp.Body.Close()
				if resp.StatusCode != http.StatusOK {
					failures.Store(resp.Status, true)
				}
			}
		}()
	}
	writeCheckpoint(t, path, 2) // other weights
	if err := s.reload(); err != nil {
		t.Fatal(err)
	}
	after := score()
	if after == before {
		t.Fatalf("score %v unchanged after loading other weights", after)
	}
	if err := os.WriteFile(path, []byte("not a checkpoint"), 0o644); err != nil {
		t.Fatal(err)
	}
	code, out := post(t, ts.URL+"/reload", "")
	if code != http.StatusInternalServerError || out["kind"] != "reload" {
		t.Fatalf("reload of a corrupt file: %d %v", code, out)
	}
	if got := score(); got != after {
		t.Fatalf("after a failed reload the score is %v, want the last good model's %v", got, after)
	}
	close(stop)
	wg.Wait()
	failures.Range(func(k, _ any) bool {
		t.Errorf("a request failed during the reloads: %v", k)
		return true
	})
	if !strings.Contains(get(t, ts.URL+"/metrics"), `scoreserver_reloads_total{result="failed"} 1`) {
		t.Error("the failed reload is not counted")
	}
}

// TestServeShutdown runs the command's serve loop on a loopback port,
// scores once and cancels: serve must return without error.
func TestServeShutdown(t *testing.T) {
	path := filepath.Join(t.TempDir(), "model.safetensors")
	writeCheckpoint(t, path, 1)
	cfg := defaultConfig()
	cfg.Addr, cfg.Model = "127.0.0.1:0", path
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan string, 1)
	done := make(chan error, 1)
	go func() { done <- serve(ctx, cfg, testLogger(), ready) }()
	addr := <-ready
	if code, out := post(t, "http://"+addr+"/score", `{"values":`+goodValues+`,"label":"booster"}`); code != 200 {
		t.Fatalf("status %d: %v", code, out)
	}
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
// it: the path the README's one command takes.
func TestDemoModel(t *testing.T) {
	if testing.Short() {
		t.Skip("trains a model")
	}
	path, err := trainDemo(context.Background(), t.TempDir(), 1, 1,
		fleetSize{Stations: 3, HistoryDays: 3, ValDays: 1, Interval: 30 * time.Minute, Hidden: []int{16}})
	if err != nil {
		t.Fatal(err)
	}
	s, err := newServer(path, Options{})
	if err != nil {
		t.Fatal(err)
	}
	l := s.cur.Load()
	if math.IsNaN(l.threshold) || len(l.labels) != 3 || len(l.features) != 12 {
		t.Fatalf("demo checkpoint metadata: threshold %v, labels %v, features %v", l.threshold, l.labels, l.features)
	}
}

func TestFlags(t *testing.T) {
	var out bytes.Buffer
	if _, err := parseFlags([]string{"-h"}, &out); !errors.Is(err, flag.ErrHelp) || !strings.Contains(out.String(), "POST /score") {
		t.Fatalf("-h: %v\n%s", err, out.String())
	}
	for _, args := range [][]string{{"-k", "0"}, {"-epochs", "0"}, {"-max-body", "0"}, {"stray"}, {"-mean", "-k", "4"}} {
		if _, err := parseFlags(args, io.Discard); err == nil {
			t.Errorf("%v accepted", args)
		}
	}
	cfg, err := parseFlags([]string{"-addr", "127.0.0.1:0", "-k", "8", "-seed", "4"}, io.Discard)
	if err != nil || cfg.K != 8 || cfg.Seed != 4 {
		t.Fatalf("%+v, %v", cfg, err)
	}
}

// BenchmarkServeLoopback posts single-record requests to a server on the
// loopback interface from GOMAXPROCS goroutines and reports requests/s
// and the latency percentiles seen by the clients.
func BenchmarkServeLoopback(b *testing.B) {
	_, ts, _ := testServer(b, Options{K: 1, Seed: 1})
	body := []byte(`{"values":` + goodValues + `,"label":"booster"}`)
	var mu sync.Mutex
	lat := make([]time.Duration, 0, b.N)
	client := &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: 64}}
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		var mine []time.Duration
		for pb.Next() {
			t0 := time.Now()
			resp, err := client.Post(ts.URL+"/score", "application/json", bytes.NewReader(body))
			if err != nil {
				b.Error(err)
				return
			}
			_, _ = io.Copy(io.Discard, resp.Body)
			resp.Body.Close()
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
