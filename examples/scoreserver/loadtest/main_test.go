package main

import (
	"context"
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync/atomic"
	"testing"
	"time"
)

func TestLoopbackOnly(t *testing.T) {
	for _, u := range []string{"http://127.0.0.1:8080", "http://localhost:1", "http://[::1]:80"} {
		if err := loopback(u); err != nil {
			t.Errorf("%s: %v", u, err)
		}
	}
	for _, u := range []string{"http://10.0.0.1:8080", "http://example.com", "http://0.0.0.0:80"} {
		if err := loopback(u); err == nil {
			t.Errorf("%s accepted", u)
		}
	}
}

// TestRunCounts runs against a stub server on the loopback interface that
// fails every fifth request, and checks the counts.
func TestRunCounts(t *testing.T) {
	var n atomic.Int64
	ts := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path == "/healthz" {
			_, _ = w.Write([]byte(`{"columns":[{"name":"a","kind":"real","mean":1,"std":0.5},{"name":"m","kind":"categorical","categories":["u","v"]}],"labels":["x"],"classes":1,"example":[1,"v"]}`))
			return
		}
		var req map[string]any
		if err := json.NewDecoder(r.Body).Decode(&req); err != nil || req["label"] != "x" {
			http.Error(w, "bad", 400)
			return
		}
		// The real value moves by at most 0.2 standard deviations; the
		// category stays.
		v := req["values"].([]any)
		if a := v[0].(float64); a < 0.9 || a > 1.1 || a == 1 || v[1] != "v" {
			http.Error(w, "bad", 400)
			return
		}
		if n.Add(1)%5 == 0 {
			http.Error(w, "boom", 500)
			return
		}
		_, _ = w.Write([]byte(`{"scores":[{"score":1}]}`))
	}))
	defer ts.Close()
	res, err := run(context.Background(), ts.URL, 50, 1, 10*time.Second, 1)
	if err != nil {
		t.Fatal(err)
	}
	if res.Requests != 50 || res.Errors != 10 || res.P50 <= 0 || res.P99 < res.P50 {
		t.Fatalf("%+v", res)
	}
	if !strings.Contains(res.String(), "50 requests (10 failed)") {
		t.Fatalf("report %q", res)
	}
}
