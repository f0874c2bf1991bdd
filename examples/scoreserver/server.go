package main

import (
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// Checkpoint metadata keys, the telemetry example's: the standardisation
// of the raw readings, the feature (sensor) names, the label (station
// type) names. The alarm threshold is the vae/alarm calibration stored
// under alarm.MetadataKey, when the checkpoint has one.
const (
	extraStandardizer = "telemetry.standardizer"
	extraFeatures     = "telemetry.features"
	extraTypes        = "telemetry.station_types"
)

// Options configures a server.
type Options struct {
	// K, Seed and Mean choose the score (see vae.ScorerOptions).
	K    int
	Seed uint64
	Mean bool
	// MaxBody bounds a request body, bytes; MaxRecords the records in one
	// request.
	MaxBody    int64
	MaxRecords int
	// Log receives one line per reload and per failed request; nil
	// discards.
	Log *slog.Logger
}

// loaded is one checkpoint ready to serve. It is never changed after
// loading: a reload builds a new one and swaps the pointer.
type loaded struct {
	path      string
	model     *vae.Model
	scorer    *vae.Scorer
	z         dataset.Standardizer
	features  []string
	labels    []string // class names of a conditional model
	threshold float64  // NaN when the checkpoint has none
	at        time.Time
}

// load reads a checkpoint and what the scoring needs from its metadata.
func load(path string, opt Options) (*loaded, error) {
	m, err := vae.Load(path)
	if err != nil {
		return nil, err
	}
	extra := m.Extra()
	l := &loaded{path: path, model: m, threshold: math.NaN(), at: time.Now()}
	if err := json.Unmarshal([]byte(extra[extraStandardizer]), &l.z); err != nil {
		return nil, fmt.Errorf("%s: metadata %s: %w", path, extraStandardizer, err)
	}
	if err := l.z.Validate(); err != nil {
		return nil, fmt.Errorf("%s: metadata %s: %w", path, extraStandardizer, err)
	}
	if len(l.z.Mean) != m.Features() {
		return nil, fmt.Errorf("%s: standardisation has %d features, the model %d", path, len(l.z.Mean), m.Features())
	}
	if s, ok := extra[extraFeatures]; ok {
		if err := json.Unmarshal([]byte(s), &l.features); err != nil || len(l.features) != m.Features() {
			return nil, fmt.Errorf("%s: metadata %s: want %d names (%v)", path, extraFeatures, m.Features(), err)
		}
	} else {
		for j := 0; j < m.Features(); j++ {
			l.features = append(l.features, "feature_"+strconv.Itoa(j))
		}
	}
	if m.Classes() > 0 {
		if s, ok := extra[extraTypes]; ok {
			if err := json.Unmarshal([]byte(s), &l.labels); err != nil || len(l.labels) != m.Classes() {
				return nil, fmt.Errorf("%s: metadata %s: want %d names (%v)", path, extraTypes, m.Classes(), err)
			}
		}
	}
	switch cal, err := alarm.Get(m); {
	case err == nil:
		l.threshold = cal.Threshold()
	case !errors.Is(err, alarm.ErrNoCalibration):
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	if l.scorer, err = m.NewScorer(vae.ScorerOptions{K: opt.K, Seed: opt.Seed, Mean: opt.Mean}); err != nil {
		return nil, err
	}
	return l, nil
}

// server serves one model at a time and swaps it atomically on reload.
type server struct {
	opt      Options
	path     string // the checkpoint that reload reads
	cur      atomic.Pointer[loaded]
	reloadMu sync.Mutex // one reload at a time
	reg      *prometheus.Registry
	requests *prometheus.CounterVec
	latency  *prometheus.HistogramVec
	scores   prometheus.Histogram
	errs     *prometheus.CounterVec
	records  prometheus.Counter
	reloads  *prometheus.CounterVec
}

// newServer loads the checkpoint at path and returns a server for it.
func newServer(path string, opt Options) (*server, error) {
	if opt.MaxBody <= 0 {
		opt.MaxBody = 1 << 20
	}
	if opt.MaxRecords <= 0 {
		opt.MaxRecords = 1000
	}
	if opt.Log == nil {
		opt.Log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	l, err := load(path, opt)
	if err != nil {
		return nil, err
	}
	s := &server{opt: opt, path: path, reg: prometheus.NewRegistry()}
	s.cur.Store(l)
	s.requests = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "scoreserver_requests_total",
		Help: "HTTP requests by path and status code."}, []string{"path", "code"})
	s.latency = prometheus.NewHistogramVec(prometheus.HistogramOpts{Name: "scoreserver_request_duration_seconds",
		Help:    "Time from request to response, by path.",
		Buckets: prometheus.ExponentialBuckets(25e-6, 2, 16)}, []string{"path"})
	s.scores = prometheus.NewHistogram(prometheus.HistogramOpts{Name: "scoreserver_score_nats",
		Help:    "Anomaly scores returned, nats (higher is less like normal operation).",
		Buckets: []float64{-20, -10, -5, 0, 5, 10, 20, 50, 100, 200, 500, 1000, 5000}})
	s.errs = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "scoreserver_errors_total",
		Help: "Rejected or failed requests by kind."}, []string{"kind"})
	s.records = prometheus.NewCounter(prometheus.CounterOpts{Name: "scoreserver_records_total", Help: "Records scored."})
	s.reloads = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "scoreserver_reloads_total",
		Help: "Checkpoint reloads by result (ok, failed)."}, []string{"result"})
	s.reg.MustRegister(s.requests, s.latency, s.scores, s.errs, s.records, s.reloads)
	return s, nil
}

// reload reads the checkpoint again and swaps it in; on failure the
// current model stays. Requests in flight finish on the model they
// started with.
func (s *server) reload() error {
	s.reloadMu.Lock()
	defer s.reloadMu.Unlock()
	l, err := load(s.path, s.opt)
	if err != nil {
		s.reloads.WithLabelValues("failed").Inc()
		s.opt.Log.Error("reload failed; keeping the current model", "path", s.path, "err", err)
		return err
	}
	s.cur.Store(l)
	s.reloads.WithLabelValues("ok").Inc()
	s.opt.Log.Info("reloaded", "path", s.path)
	return nil
}

// handler returns the server's routes.
func (s *server) handler() http.Handler {
	mux := http.NewServeMux()
	mux.Handle("POST /score", s.instrument("/score", s.handleScore))
	mux.Handle("GET /healthz", s.instrument("/healthz", s.handleHealth))
	mux.Handle("POST /reload", s.instrument("/reload", s.handleReload))
	mux.Handle("GET /metrics", promhttp.HandlerFor(s.reg, promhttp.HandlerOpts{}))
	return mux
}

// statusWriter remembers the status code written.
type statusWriter struct {
	http.ResponseWriter
	code int
}

func (w *statusWriter) WriteHeader(code int) {
	w.code = code
	w.ResponseWriter.WriteHeader(code)
}

func (s *server) instrument(path string, h http.HandlerFunc) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		t0 := time.Now()
		sw := &statusWriter{ResponseWriter: w, code: http.StatusOK}
		h(sw, r)
		s.latency.WithLabelValues(path).Observe(time.Since(t0).Seconds())
		s.requests.WithLabelValues(path, strconv.Itoa(sw.code)).Inc()
	})
}

// requestError is a problem with a request: its status, its kind (the
// label of scoreserver_errors_total) and a message naming what is wrong.
type requestError struct {
	code int
	kind string
	msg  string
}

func (e *requestError) Error() string { return e.msg }

func bad(kind, format string, a ...any) *requestError {
	return &requestError{code: http.StatusBadRequest, kind: kind, msg: fmt.Sprintf(format, a...)}
}

func (s *server) fail(w http.ResponseWriter, err *requestError) {
	s.errs.WithLabelValues(err.kind).Inc()
	writeJSON(w, err.code, map[string]string{"error": err.msg, "kind": err.kind})
}

func writeJSON(w http.ResponseWriter, code int, v any) {
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	_ = json.NewEncoder(w).Encode(v)
}

// Record is one record of a request: the raw readings in the model's
// feature order, the label of a conditional model (its name or its index)
// and an optional noise key (for example a reading's id), which makes its
// score the same in every request.
type Record struct {
	Values []float64       `json:"values"`
	Label  json.RawMessage `json:"label,omitempty"`
	Key    *uint64         `json:"key,omitempty"`
}

// ScoreRequest is the body of POST /score: either one record's fields at
// the top level, or many under "records". Columns asks for each feature's
// part of the reconstruction term.
type ScoreRequest struct {
	Record
	Records []Record `json:"records,omitempty"`
	Columns bool     `json:"columns,omitempty"`
}

// Scored is the result for one record.
type Scored struct {
	Score float64 `json:"score"`
	// Flagged is score > the checkpoint's threshold; absent when it has
	// none.
	Flagged *bool `json:"flagged,omitempty"`
	// Columns maps feature name to -log p(x_j|z), when asked.
	Columns map[string]float64 `json:"columns,omitempty"`
}

// ScoreResponse is the answer to POST /score.
type ScoreResponse struct {
	Model     string   `json:"model"`
	Threshold *float64 `json:"threshold,omitempty"`
	Scores    []Scored `json:"scores"`
}

func (s *server) handleScore(w http.ResponseWriter, r *http.Request) {
	l := s.cur.Load() // one model for the whole request
	r.Body = http.MaxBytesReader(w, r.Body, s.opt.MaxBody)
	dec := json.NewDecoder(r.Body)
	dec.DisallowUnknownFields()
	var req ScoreRequest
	if err := dec.Decode(&req); err != nil {
		var tooBig *http.MaxBytesError
		if errors.As(err, &tooBig) {
			s.fail(w, &requestError{code: http.StatusRequestEntityTooLarge, kind: "too_large",
				msg: fmt.Sprintf("request body is larger than %d bytes", s.opt.MaxBody)})
			return
		}
		s.fail(w, bad("malformed_json", "malformed JSON: %v", err))
		return
	}
	if dec.More() {
		s.fail(w, bad("malformed_json", "malformed JSON: more than one value in the body"))
		return
	}
	recs := req.Records
	if recs == nil {
		if req.Values == nil {
			s.fail(w, bad("malformed_json", `no record: give "values" (one record) or "records"`))
			return
		}
		recs = []Record{req.Record}
	} else if req.Values != nil {
		s.fail(w, bad("malformed_json", `give either "values" (one record) or "records", not both`))
		return
	}
	if len(recs) == 0 {
		s.fail(w, bad("malformed_json", `"records" is empty`))
		return
	}
	if len(recs) > s.opt.MaxRecords {
		s.fail(w, &requestError{code: http.StatusRequestEntityTooLarge, kind: "too_many_records",
			msg: fmt.Sprintf("%d records in one request, at most %d", len(recs), s.opt.MaxRecords)})
		return
	}
	out, rerr := s.score(r, l, recs, req.Columns)
	if rerr != nil {
		s.fail(w, rerr)
		return
	}
	resp := ScoreResponse{Model: l.path, Scores: out}
	if !math.IsNaN(l.threshold) {
		th := l.threshold
		resp.Threshold = &th
	}
	writeJSON(w, http.StatusOK, resp)
}

// score checks, standardises and scores the records.
func (s *server) score(r *http.Request, l *loaded, recs []Record, columns bool) ([]Scored, *requestError) {
	f := l.model.Features()
	n := len(recs)
	x := make([]float64, 0, n*f)
	var labels []int
	if l.model.Classes() > 0 {
		labels = make([]int, n)
	}
	var keys []uint64
	for i, rec := range recs {
		if len(rec.Values) != f {
			return nil, bad("feature_count", "record %d: %d values, the model wants %d (%s)", i, len(rec.Values), f, strings.Join(l.features, ", "))
		}
		for j, v := range rec.Values {
			z := (v - l.z.Mean[j]) / l.z.Std[j]
			if math.IsNaN(z) || math.IsInf(z, 0) || math.IsInf(float64(float32(z)), 0) {
				return nil, bad("non_finite", "record %d, feature %d (%s): %v is out of range", i, j, l.features[j], v)
			}
			x = append(x, z)
		}
		if labels != nil {
			lab, err := l.label(rec.Label)
			if err != nil {
				return nil, bad("label", "record %d: %v", i, err)
			}
			labels[i] = lab
		} else if len(rec.Label) > 0 {
			return nil, bad("label", "record %d: the model is not conditional; drop the label", i)
		}
		if rec.Key != nil {
			if keys == nil {
				if i > 0 {
					return nil, bad("key", "record %d has a key and record 0 has none: give every record a key or none", i)
				}
				keys = make([]uint64, n)
			}
			keys[i] = *rec.Key
		} else if keys != nil {
			return nil, bad("key", "record %d has no key and record 0 has one: give every record a key or none", i)
		}
	}
	scores := make([]float64, n)
	var cols []float64
	if columns {
		cols = make([]float64, n*f)
	}
	if err := l.scorer.Score(r.Context(), scores, vae.Records{X: x, Labels: labels, Keys: keys}, cols); err != nil {
		switch {
		case errors.Is(err, vae.ErrLabel):
			return nil, bad("label", "%v", err)
		case errors.Is(err, layers.ErrInvalidArgument):
			return nil, bad("non_finite", "%v", err)
		}
		s.opt.Log.Error("scoring failed", "err", err)
		return nil, &requestError{code: http.StatusInternalServerError, kind: "internal", msg: "scoring failed: " + err.Error()}
	}
	out := make([]Scored, n)
	for i, sc := range scores {
		out[i].Score = sc
		s.scores.Observe(sc)
		if !math.IsNaN(l.threshold) {
			fl := sc > l.threshold
			out[i].Flagged = &fl
		}
		if cols != nil {
			out[i].Columns = make(map[string]float64, f)
			for j, name := range l.features {
				out[i].Columns[name] = cols[i*f+j]
			}
		}
	}
	s.records.Add(float64(n))
	return out, nil
}

// label reads a label given as a class name or index.
func (l *loaded) label(raw json.RawMessage) (int, error) {
	if len(raw) == 0 {
		return 0, fmt.Errorf("no label; the model needs one of %s", l.labelNames())
	}
	var name string
	if err := json.Unmarshal(raw, &name); err == nil {
		for i, v := range l.labels {
			if v == name {
				return i, nil
			}
		}
		return 0, fmt.Errorf("unknown label %q (want one of %s)", name, l.labelNames())
	}
	var idx int
	if err := json.Unmarshal(raw, &idx); err != nil || idx < 0 || idx >= l.model.Classes() {
		return 0, fmt.Errorf("unknown label %s (want one of %s)", string(raw), l.labelNames())
	}
	return idx, nil
}

func (l *loaded) labelNames() string {
	if len(l.labels) == 0 {
		return fmt.Sprintf("0..%d", l.model.Classes()-1)
	}
	return strings.Join(l.labels, ", ") + fmt.Sprintf(" or 0..%d", l.model.Classes()-1)
}

// Health is the answer to GET /healthz.
type Health struct {
	Status   string   `json:"status"`
	Model    string   `json:"model"`
	Loaded   string   `json:"loaded"`
	Features []string `json:"features"`
	Labels   []string `json:"labels,omitempty"`
	// Means are the training means of the raw features: a typical record.
	Means []float64 `json:"means"`
	Lean  bool      `json:"lean"`
}

func (s *server) handleHealth(w http.ResponseWriter, r *http.Request) {
	l := s.cur.Load()
	lean, _ := l.scorer.Lean()
	writeJSON(w, http.StatusOK, Health{Status: "ok", Model: l.path, Loaded: l.at.UTC().Format(time.RFC3339),
		Features: l.features, Labels: l.labels, Means: l.z.Mean, Lean: lean})
}

func (s *server) handleReload(w http.ResponseWriter, r *http.Request) {
	if err := s.reload(); err != nil {
		s.fail(w, &requestError{code: http.StatusInternalServerError, kind: "reload", msg: "reload failed, the current model stays: " + err.Error()})
		return
	}
	s.handleHealth(w, r)
}
