// Command loadtest sends single-record scoring requests to a scoreserver on
// this machine and reports the throughput and the latency percentiles the
// clients saw. It reads the served model's columns and example record from
// GET /healthz, so it works with any checkpoint the server loads. It talks
// to loopback addresses only and stops after -n requests or -duration,
// whichever comes first.
//
//	go run ./examples/scoreserver &          # serves on 127.0.0.1:8080
//	go run ./examples/scoreserver/loadtest -n 20000 -c 8
package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"net/http"
	"net/url"
	"os"
	"slices"
	"sync"
	"sync/atomic"
	"time"
)

// health is the part of GET /healthz the load test needs.
type health struct {
	Columns []struct {
		Name string  `json:"name"`
		Kind string  `json:"kind"`
		Std  float64 `json:"std"`
	} `json:"columns"`
	Labels  []string `json:"labels"`
	Classes int      `json:"classes"`
	Example []any    `json:"example"`
}

// Result is what a run measured.
type Result struct {
	Requests, Errors int
	Elapsed          time.Duration
	P50, P99, Max    time.Duration
}

func (r Result) String() string {
	return fmt.Sprintf("%d requests (%d failed) in %.2fs: %.0f requests/s; latency p50 %v, p99 %v, max %v",
		r.Requests, r.Errors, r.Elapsed.Seconds(), float64(r.Requests)/r.Elapsed.Seconds(), r.P50, r.P99, r.Max)
}

func main() {
	base := flag.String("url", "http://127.0.0.1:8080", "`URL` of the scoreserver (loopback only)")
	n := flag.Int("n", 20000, "requests to send at most")
	c := flag.Int("c", 8, "concurrent clients")
	d := flag.Duration("duration", 30*time.Second, "longest run")
	seed := flag.Uint64("seed", 1, "seed of the records sent")
	flag.Parse()
	res, err := run(context.Background(), *base, *n, *c, *d, *seed)
	if err != nil {
		fmt.Fprintln(os.Stderr, "loadtest:", err)
		os.Exit(1)
	}
	fmt.Println(res)
}

// loopback reports whether the URL's host is a loopback address.
func loopback(raw string) error {
	u, err := url.Parse(raw)
	if err != nil {
		return err
	}
	host := u.Hostname()
	if host == "localhost" {
		return nil
	}
	ip := net.ParseIP(host)
	if ip == nil || !ip.IsLoopback() {
		return fmt.Errorf("-url %s: only loopback addresses (127.0.0.0/8, ::1, localhost) are allowed", raw)
	}
	return nil
}

// run sends up to n requests from c clients for at most d.
func run(ctx context.Context, base string, n, c int, d time.Duration, seed uint64) (Result, error) {
	if err := loopback(base); err != nil {
		return Result{}, err
	}
	if n < 1 || c < 1 || d <= 0 {
		return Result{}, errors.New("-n, -c and -duration must be positive")
	}
	resp, err := http.Get(base + "/healthz")
	if err != nil {
		return Result{}, err
	}
	var h health
	err = json.NewDecoder(resp.Body).Decode(&h)
	resp.Body.Close()
	if err != nil {
		return Result{}, fmt.Errorf("healthz: %w", err)
	}
	if len(h.Example) != len(h.Columns) || len(h.Example) == 0 {
		return Result{}, fmt.Errorf("healthz: %d columns, an example of %d values", len(h.Columns), len(h.Example))
	}
	// 256 request bodies: the server's example record (the training means
	// of the real columns) with each real value moved by up to 0.2
	// standard deviations, under the classes in turn. They measure the
	// cost of a request, not detection: many of them score above the
	// threshold.
	rng := rand.New(rand.NewPCG(seed, 7))
	bodies := make([][]byte, 256)
	for i := range bodies {
		v := slices.Clone(h.Example)
		for j, c := range h.Columns {
			if x, ok := v[j].(float64); ok && c.Kind == "real" {
				v[j] = x + 0.2*c.Std*(2*rng.Float64()-1)
			}
		}
		req := map[string]any{"values": v, "key": i}
		switch {
		case len(h.Labels) > 0:
			req["label"] = h.Labels[i%len(h.Labels)]
		case h.Classes > 0:
			req["label"] = i % h.Classes
		}
		if bodies[i], err = json.Marshal(req); err != nil {
			return Result{}, err
		}
	}
	ctx, cancel := context.WithTimeout(ctx, d)
	defer cancel()
	client := &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: c}, Timeout: 10 * time.Second}
	var next, failed atomic.Int64
	lat := make([][]time.Duration, c)
	var wg sync.WaitGroup
	t0 := time.Now()
	for g := 0; g < c; g++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				i := next.Add(1) - 1
				if i >= int64(n) || ctx.Err() != nil {
					return
				}
				start := time.Now()
				req, _ := http.NewRequestWithContext(ctx, http.MethodPost, base+"/score", bytes.NewReader(bodies[i%256]))
				req.Header.Set("Content-Type", "application/json")
				resp, err := client.Do(req)
				if err != nil {
					if ctx.Err() == nil {
						failed.Add(1)
					}
					continue
				}
				_, _ = io.Copy(io.Discard, resp.Body)
				resp.Body.Close()
				if resp.StatusCode != http.StatusOK {
					failed.Add(1)
					continue
				}
				lat[g] = append(lat[g], time.Since(start))
			}
		}()
	}
	wg.Wait()
	res := Result{Elapsed: time.Since(t0), Errors: int(failed.Load())}
	all := slices.Concat(lat...)
	res.Requests = len(all) + res.Errors
	if len(all) == 0 {
		return res, errors.New("no request succeeded")
	}
	slices.Sort(all)
	res.P50, res.P99, res.Max = all[len(all)/2], all[len(all)*99/100], all[len(all)-1]
	return res, nil
}
