package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/dataset"
)

// Options configures a server.
type Options struct {
	// K, Seed and Mean choose the score (see vae.ScorerOptions). K of 0
	// means the checkpoint's (metadata score.k), else 1; a K that
	// conflicts with a calibrated checkpoint's is an error. Seed is used
	// when SeedSet or when the checkpoint records none (score.seed).
	K       int
	Seed    uint64
	SeedSet bool
	Mean    bool
	// MaxBody bounds a request body, bytes; MaxRecords the records in one
	// request.
	MaxBody    int64
	MaxRecords int
	// Log receives one line per reload and per failed request; nil
	// discards.
	Log *slog.Logger
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
	flagged  prometheus.Counter
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
	l, err := load(context.Background(), path, opt, opt.Log)
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
	s.flagged = prometheus.NewCounter(prometheus.CounterOpts{Name: "scoreserver_flagged_total",
		Help: "Records scored above the checkpoint's alarm threshold."})
	s.reg.MustRegister(s.requests, s.latency, s.scores, s.errs, s.records, s.flagged, s.reloads)
	return s, nil
}

// reload reads the checkpoint again and swaps it in; on failure the
// current model stays. Requests in flight finish on the model they
// started with.
func (s *server) reload() error {
	s.reloadMu.Lock()
	defer s.reloadMu.Unlock()
	l, err := load(context.Background(), s.path, s.opt, s.opt.Log)
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

// Record is one record of a request. Values holds its raw values, either
// as an array in the model's column order or as an object keyed by column
// name; a value is a number, a category's name (or index) for a
// categorical column, or null for a missing value. In the object form an
// absent column is missing too. Missing values are accepted only when the
// model's likelihood is a losses.Columns. Label is the class of a
// conditional model (its name or its index); Key an optional noise key
// (for example a reading's id), which makes the record's score the same
// in every request.
type Record struct {
	Values json.RawMessage `json:"values"`
	Label  json.RawMessage `json:"label,omitempty"`
	Key    *uint64         `json:"key,omitempty"`
}

// ScoreRequest is the body of POST /score: either one record's fields at
// the top level, or many under "records". Columns asks for each column's
// part of the reconstruction term.
type ScoreRequest struct {
	Record
	Records []Record `json:"records,omitempty"`
	Columns bool     `json:"columns,omitempty"`
}

// Scored is the result for one record.
type Scored struct {
	Score float64 `json:"score"`
	// Flagged is score > the checkpoint's threshold and PValue the
	// conformal p-value of the score against the calibration scores
	// (alarm.Calibration.PValue); both absent when the checkpoint has no
	// calibration.
	Flagged *bool    `json:"flagged,omitempty"`
	PValue  *float64 `json:"p_value,omitempty"`
	// Observed counts the record's non-missing values, for a model that
	// accepts missing values: the score is over the observed values only,
	// so compare records with the same count.
	Observed *int `json:"observed,omitempty"`
	// Columns maps column name to its part of the reconstruction term,
	// -log p(x_j|z) (0 for a missing value), when asked.
	Columns map[string]float64 `json:"columns,omitempty"`
}

// ScoreResponse is the answer to POST /score.
type ScoreResponse struct {
	Model     string   `json:"model"`
	K         int      `json:"k"`
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
	} else if req.Values != nil || req.Label != nil || req.Key != nil {
		s.fail(w, bad("malformed_json", `give either one record ("values", "label", "key") or "records", not both`))
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
	resp := ScoreResponse{Model: l.path, K: l.score.K, Scores: out}
	if l.cal != nil {
		th := l.cal.Threshold()
		resp.Threshold = &th
	}
	writeJSON(w, http.StatusOK, resp)
}

// score reads, checks, standardises and scores the records.
func (s *server) score(r *http.Request, l *loaded, recs []Record, columns bool) ([]Scored, *requestError) {
	f := len(l.cols)
	n := len(recs)
	x := make([]float64, n*f)
	observed := make([]int, n)
	var labels []int
	if l.model.Classes() > 0 {
		labels = make([]int, n)
	}
	var keys []uint64
	for i, rec := range recs {
		nobs, rerr := l.values(i, rec.Values, x[i*f:(i+1)*f])
		if rerr != nil {
			return nil, rerr
		}
		observed[i] = nobs
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
	if columns && !l.lean && l.mixed == nil {
		return nil, bad("columns", "per-column terms: the model is scored through its graphs (%s) and its likelihood is not a losses.Columns; ask without \"columns\"", l.why)
	}
	var scores, cols []float64
	var err error
	if l.lean {
		scores = make([]float64, n)
		if columns {
			cols = make([]float64, n*f)
		}
		err = l.scorer.Score(r.Context(), scores, vae.Records{X: x, Labels: labels, Keys: keys}, cols)
	} else {
		scores, cols, err = l.graphScore(r.Context(), x, labels, keys, columns)
	}
	if err != nil {
		switch {
		case errors.Is(err, vae.ErrLabel):
			return nil, bad("label", "%v", err)
		case errors.Is(err, layers.ErrInvalidArgument), errors.Is(err, dataset.ErrInvalidData):
			return nil, bad("bad_value", "%v", err)
		case r.Context().Err() != nil:
			return nil, &requestError{code: 499, kind: "cancelled", msg: "request cancelled"}
		}
		s.opt.Log.Error("scoring failed", "err", err)
		return nil, &requestError{code: http.StatusInternalServerError, kind: "internal", msg: "scoring failed: " + err.Error()}
	}
	out := make([]Scored, n)
	for i, sc := range scores {
		out[i].Score = sc
		s.scores.Observe(sc)
		if l.cal != nil {
			p, err := l.cal.PValue(sc)
			if err != nil {
				return nil, &requestError{code: http.StatusInternalServerError, kind: "internal", msg: fmt.Sprintf("record %d: p-value: %v", i, err)}
			}
			fl := sc > l.cal.Threshold()
			out[i].Flagged, out[i].PValue = &fl, &p
			if fl {
				s.flagged.Inc()
			}
		}
		if l.missingOK() {
			out[i].Observed = &observed[i]
		}
		if cols != nil {
			out[i].Columns = make(map[string]float64, f)
			for j, c := range l.cols {
				v := cols[i*f+j]
				if v == 0 {
					v = 0 // not -0 (a missing value's term)
				}
				out[i].Columns[c.Name] = v
			}
		}
	}
	s.records.Add(float64(n))
	return out, nil
}

// values reads record i's raw values (an array in column order or an
// object keyed by column name) into dst as the model's inputs:
// standardised, categories as their index, NaN where missing. It returns
// the number of observed values.
func (l *loaded) values(i int, raw json.RawMessage, dst []float64) (int, *requestError) {
	f := len(l.cols)
	raw = bytes.TrimSpace(raw)
	switch {
	case len(raw) == 0 || bytes.Equal(raw, []byte("null")):
		return 0, bad("malformed_json", `record %d: no "values"`, i)
	case raw[0] == '[':
		var elems []json.RawMessage
		if err := json.Unmarshal(raw, &elems); err != nil {
			return 0, bad("malformed_json", "record %d: values: %v", i, err)
		}
		if len(elems) != f {
			return 0, bad("feature_count", "record %d: %d values, the model wants %d (%s; null for a missing one)", i, len(elems), f, l.columnNames())
		}
		for j, e := range elems {
			if rerr := l.value(i, j, e, &dst[j]); rerr != nil {
				return 0, rerr
			}
		}
	case raw[0] == '{':
		var fields map[string]json.RawMessage
		if err := json.Unmarshal(raw, &fields); err != nil {
			return 0, bad("malformed_json", "record %d: values: %v", i, err)
		}
		for j := range dst {
			dst[j] = math.NaN()
		}
		names := make([]string, 0, len(fields))
		for name := range fields {
			names = append(names, name)
		}
		slices.Sort(names) // the first unknown name, whatever the map order
		for _, name := range names {
			j, ok := l.byName[name]
			if !ok {
				return 0, bad("unknown_column", "record %d: unknown column %q (the model's columns: %s)", i, name, l.columnNames())
			}
			if rerr := l.value(i, j, fields[name], &dst[j]); rerr != nil {
				return 0, rerr
			}
		}
	default:
		return 0, bad("malformed_json", "record %d: values: want an array in column order or an object keyed by column name", i)
	}
	nobs := 0
	for j, v := range dst {
		if !math.IsNaN(v) {
			nobs++
			continue
		}
		if !l.missingOK() {
			return 0, bad("missing", "record %d, column %q: missing; this model (likelihood %T) needs every column", i, l.cols[j].Name, l.model.Likelihood())
		}
	}
	if nobs == 0 {
		return 0, bad("missing", "record %d: every column is missing", i)
	}
	return nobs, nil
}

// value reads one raw value of record i, column j.
func (l *loaded) value(i, j int, raw json.RawMessage, dst *float64) *requestError {
	c := l.cols[j]
	where := fmt.Sprintf("record %d, column %q", i, c.Name)
	raw = bytes.TrimSpace(raw)
	if len(raw) == 0 {
		return bad("malformed_json", "%s: empty value", where)
	}
	var v float64
	switch raw[0] {
	case 'n':
		*dst = math.NaN() // null: missing
		return nil
	case '"':
		var name string
		if err := json.Unmarshal(raw, &name); err != nil {
			return bad("malformed_json", "%s: %v", where, err)
		}
		if c.Kind != dataset.KindCategorical {
			return bad("bad_value", "%s: %q: a %s column takes a number (or null)", where, name, c.Kind)
		}
		k := c.CategoryIndex(name)
		if k < 0 {
			return bad("category", "%s: unknown category %q (want one of %s)", where, name, quoteAll(c.Categories))
		}
		*dst = float64(k)
		return nil
	case 't', 'f', '[', '{':
		return bad("bad_value", "%s: %s: want a number%s or null", where, raw, map[bool]string{true: " or a category name", false: ""}[c.Kind == dataset.KindCategorical])
	}
	v, err := strconv.ParseFloat(string(raw), 64)
	if err != nil {
		if errors.Is(err, strconv.ErrRange) {
			return bad("non_finite", "%s: %s is out of range", where, raw)
		}
		return bad("malformed_json", "%s: %s is not a number", where, raw)
	}
	if c.Kind == dataset.KindCategorical {
		if v < 0 || v != math.Floor(v) || v >= float64(len(c.Categories)) {
			return bad("category", "%s: %v is not a category (want one of %s, or an index 0..%d)", where, v, quoteAll(c.Categories), len(c.Categories)-1)
		}
		*dst = v
		return nil
	}
	z := (v - c.mean) / c.std
	if math.IsNaN(z) || math.IsInf(z, 0) || l.f32 && math.IsInf(float64(float32(z)), 0) {
		return bad("non_finite", "%s: %v is out of range", where, v)
	}
	if l.mixed != nil {
		if msg := l.mixed.CheckValue(j, z); msg != "" {
			return bad("bad_value", "%s: %v %s", where, v, msg)
		}
	}
	*dst = z
	return nil
}

func quoteAll(xs []string) string {
	q := make([]string, len(xs))
	for i, x := range xs {
		q[i] = strconv.Quote(x)
	}
	return strings.Join(q, ", ")
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
	return quoteAll(l.labels) + fmt.Sprintf(" or 0..%d", l.model.Classes()-1)
}

// HealthColumn describes one column of the served model's records.
type HealthColumn struct {
	Name       string   `json:"name"`
	Kind       string   `json:"kind"`
	Categories []string `json:"categories,omitempty"`
	// Mean and Std are the standardisation of a real column (the
	// training mean and standard deviation in raw units).
	Mean float64 `json:"mean"`
	Std  float64 `json:"std"`
}

// HealthCalibration summarises the checkpoint's alarm calibration.
type HealthCalibration struct {
	Threshold float64 `json:"threshold"`
	Alpha     float64 `json:"alpha"`
	N         int     `json:"n"`
}

// Health is the answer to GET /healthz.
type Health struct {
	Status  string         `json:"status"`
	Model   string         `json:"model"`
	Loaded  string         `json:"loaded"`
	Columns []HealthColumn `json:"columns"`
	Labels  []string       `json:"labels,omitempty"`
	// Classes is the number of classes of a conditional model.
	Classes int `json:"classes,omitempty"`
	// Missing says whether records may have missing values.
	Missing bool `json:"missing"`
	// Example is a record every column accepts, in column order: each
	// real column at its training mean. It shows the format; it is not a
	// normal record (the means of sensors that move together rarely occur
	// together), so it may well score above the threshold.
	Example     []any              `json:"example"`
	Score       scoring            `json:"score"`
	Calibration *HealthCalibration `json:"calibration,omitempty"`
	// Lean is true when the lean Scorer serves the requests, false when
	// Model.Score does (Why says why).
	Lean bool   `json:"lean"`
	Why  string `json:"why,omitempty"`
}

func (s *server) handleHealth(w http.ResponseWriter, r *http.Request) {
	l := s.cur.Load()
	h := Health{Status: "ok", Model: l.path, Loaded: l.at.UTC().Format(time.RFC3339), Labels: l.labels,
		Classes: l.model.Classes(), Missing: l.missingOK(), Example: l.example, Score: l.score, Lean: l.lean, Why: l.why}
	for _, c := range l.cols {
		h.Columns = append(h.Columns, HealthColumn{Name: c.Name, Kind: c.Kind, Categories: c.Categories, Mean: c.mean, Std: c.std})
	}
	if l.cal != nil {
		h.Calibration = &HealthCalibration{Threshold: l.cal.Threshold(), Alpha: l.cal.Alpha(), N: l.cal.N()}
	}
	writeJSON(w, http.StatusOK, h)
}

func (s *server) handleReload(w http.ResponseWriter, r *http.Request) {
	if err := s.reload(); err != nil {
		s.fail(w, &requestError{code: http.StatusInternalServerError, kind: "reload", msg: "reload failed, the current model stays: " + err.Error()})
		return
	}
	s.handleHealth(w, r)
}
