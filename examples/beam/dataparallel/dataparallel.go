// Package dataparallel simulates synchronous data-parallel training with
// parameter averaging in one process, so its cost in model quality can be
// measured before anything is distributed.
//
// A round is: every one of S shards starts from the same weights, trains
// locally for one epoch over its own part of the data (vae.Train with its
// own seed), and the S resulting parameter vectors are averaged into the
// weights of the next round. This is the "model averaging" / local-SGD
// scheme (McMahan et al. 2017, FedAvg, with every client taking part in
// every round); one round per epoch is its most communication-frugal form.
//
// Optimizer state: vae.Train starts a fresh Adam (zero moments, step 0)
// on every call and does not expose it, so each shard's Adam state is
// reset at the start of every round and never averaged. S = 1 therefore
// differs from ordinary training only by that reset, which isolates its
// cost; S > 1 adds the cost of averaging.
package dataparallel

import (
	"context"
	"errors"
	"fmt"
	"math/rand/v2"

	"lowerbound.dev/vae"
	"lowerbound.dev/vae/dataset"
)

// Config configures Run.
type Config struct {
	Shards int // S >= 1
	Rounds int // rounds = epochs over the whole data, >= 1
	// Batch and LearnRate of every shard's local training (0: the
	// vae.TrainConfig defaults, 100 and 1e-3).
	Batch     int
	LearnRate float64
	// Seed deals the records to shards and seeds every local run.
	Seed uint64
	// OnRound, when set, is called after each round's averaging with the
	// averaged model loaded into m.
	OnRound func(round int) error
}

// Shard deals the records of data to s shards: a seeded permutation cut
// into s contiguous parts whose sizes differ by at most one.
func Shard(data *dataset.Set, s int, seed uint64) ([]*dataset.Set, error) {
	if data == nil || s < 1 || s > data.Len() {
		return nil, fmt.Errorf("dataparallel.Shard: %d shards of %v records: want 1 <= shards <= records", s, lenOf(data))
	}
	perm := rand.New(rand.NewPCG(seed, 0x5a4d)).Perm(data.Len())
	out := make([]*dataset.Set, s)
	n := data.Len()
	for i := range s {
		lo, hi := i*n/s, (i+1)*n/s
		sub, err := data.Subset(perm[lo:hi])
		if err != nil {
			return nil, err
		}
		out[i] = sub
	}
	return out, nil
}

func lenOf(d *dataset.Set) any {
	if d == nil {
		return "nil"
	}
	return d.Len()
}

// Run trains m on data with cfg.Shards simulated workers. m's parameters
// are the starting weights and hold the averaged weights when Run returns.
// The shards run one after another on m itself (the starting weights are
// restored before each), so memory does not grow with S.
func Run(ctx context.Context, m *vae.Model, data *dataset.Set, cfg Config) error {
	if m == nil {
		return errors.New("dataparallel.Run: nil model")
	}
	if cfg.Rounds < 1 {
		return fmt.Errorf("dataparallel.Run: Rounds %d: want >= 1", cfg.Rounds)
	}
	shards, err := Shard(data, cfg.Shards, cfg.Seed)
	if err != nil {
		return err
	}
	start := Weights(m)
	sum := make([]float64, len(start))
	for r := 1; r <= cfg.Rounds; r++ {
		clear(sum)
		for s, sh := range shards {
			if err := SetWeights(m, start); err != nil {
				return err
			}
			seed := cfg.Seed*1_000_003 + uint64(r)*uint64(cfg.Shards) + uint64(s)
			if _, err := m.Train(ctx, sh, vae.TrainConfig{Epochs: 1, BatchSize: cfg.Batch, LearnRate: cfg.LearnRate, Seed: seed}); err != nil {
				return fmt.Errorf("dataparallel.Run: round %d, shard %d: %w", r, s, err)
			}
			for i, v := range Weights(m) {
				sum[i] += v
			}
		}
		for i := range start {
			start[i] = sum[i] / float64(len(shards))
		}
		if err := SetWeights(m, start); err != nil {
			return err
		}
		if cfg.OnRound != nil {
			if err := cfg.OnRound(r); err != nil {
				return err
			}
		}
	}
	return nil
}

// Weights returns every parameter of m flattened into one float64 vector,
// in m.Params order.
func Weights(m *vae.Model) []float64 {
	var out []float64
	for _, p := range m.Params() {
		switch d := p.Value.Data().(type) {
		case []float32:
			for _, v := range d {
				out = append(out, float64(v))
			}
		case []float64:
			out = append(out, d...)
		}
	}
	return out
}

// SetWeights writes w (as returned by Weights) into m's parameters in
// place; every compiled graph of m sees the new values.
func SetWeights(m *vae.Model, w []float64) error {
	off := 0
	for _, p := range m.Params() {
		switch d := p.Value.Data().(type) {
		case []float32:
			if off+len(d) > len(w) {
				return fmt.Errorf("dataparallel.SetWeights: %d values, the model has more", len(w))
			}
			for i := range d {
				d[i] = float32(w[off+i])
			}
			off += len(d)
		case []float64:
			if off+len(d) > len(w) {
				return fmt.Errorf("dataparallel.SetWeights: %d values, the model has more", len(w))
			}
			off += copy(d, w[off:])
		default:
			return fmt.Errorf("dataparallel.SetWeights: parameter %s: dtype %v", p.Name, p.Value.Dtype())
		}
	}
	if off != len(w) {
		return fmt.Errorf("dataparallel.SetWeights: %d values, the model has %d", len(w), off)
	}
	return nil
}
