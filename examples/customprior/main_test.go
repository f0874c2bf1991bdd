package main

import (
	"context"
	"encoding/csv"
	"os"
	"path/filepath"
	"testing"
)

// A tiny run of the whole program: both priors train through the same
// trainer with no change to the SDK, both checkpoints reload to identical
// scores, and the comparison file has one row per prior.
func TestRunSmoke(t *testing.T) {
	cfg := defaultConfig()
	cfg.Out = t.TempDir()
	cfg.Stations, cfg.HistoryDays, cfg.ValDays, cfg.TestDays, cfg.Epochs, cfg.K = 3, 3, 1, 2, 1, 4
	res, err := run(context.Background(), cfg)
	if err != nil {
		t.Fatal(err)
	}
	if len(res) != 2 {
		t.Fatalf("%d outcomes, want 2", len(res))
	}
	for _, o := range res {
		if o.ReloadMaxDiff != 0 {
			t.Errorf("%s: reloaded model scores differ by up to %v", o.Prior, o.ReloadMaxDiff)
		}
		if fi, err := os.Stat(o.Checkpoint); err != nil || fi.Size() == 0 {
			t.Errorf("%s: checkpoint %s missing or empty (%v)", o.Prior, o.Checkpoint, err)
		}
		if o.AUCAll < 0 || o.AUCAll > 1 {
			t.Errorf("%s: AUC %v outside [0, 1]", o.Prior, o.AUCAll)
		}
		// The importance-weighted bound is at least the ELBO (Burda et al.
		// 2016, Theorem 1), so the NLL estimate is at most the negative
		// ELBO up to Monte Carlo noise; a tiny model allows a loose margin.
		if !(o.Validation.NLL <= o.Validation.NegELBO+1) {
			t.Errorf("%s: NLL %v above negative ELBO %v", o.Prior, o.Validation.NLL, o.Validation.NegELBO)
		}
	}
	if res[0].Scales != nil || len(res[1].Scales) != cfg.Latent {
		t.Errorf("learned scales: standard %v, laplace %v; want none and %d", res[0].Scales, res[1].Scales, cfg.Latent)
	}
	f, err := os.Open(filepath.Join(cfg.Out, "comparison.csv"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(rows) != 3 || rows[1][0] != "standard normal" || rows[2][0] != "laplace (custom)" {
		t.Errorf("comparison.csv rows: %v", rows)
	}
}

func TestConfigValidate(t *testing.T) {
	for _, mod := range []func(*config){
		func(c *config) { c.Epochs = 0 },
		func(c *config) { c.Out = "" },
		func(c *config) { c.ValDays = c.HistoryDays },
		func(c *config) { c.K = 1 },
		func(c *config) { c.Latent = 0 },
	} {
		c := defaultConfig()
		mod(&c)
		if err := c.validate(); err == nil {
			t.Errorf("config %+v: no error", c)
		}
	}
}
