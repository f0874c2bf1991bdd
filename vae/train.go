package vae

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"time"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/vae/dataset"
	"lowerbound.dev/vae/schedule"
)

// ErrNonFinite is returned when a loss term, or a parameter after an
// optimiser update, becomes NaN or infinite. The error names the step and
// the term or parameter; the parameters are left as they were after the
// last good step (a bad update is undone) and no checkpoint is written.
var ErrNonFinite = errors.New("vae: non-finite value")

// Optimizer selects the update rule.
type Optimizer int

const (
	// Adam (Kingma and Ba 2015, Algorithm 1) with beta1 0.9, beta2 0.999
	// and eps 1e-8.
	Adam Optimizer = iota
	// SGD is plain stochastic gradient descent, with heavy-ball momentum
	// when TrainConfig.Momentum > 0.
	SGD
)

// TrainConfig configures Train. The zero value of each field is a sensible
// default where one exists; Epochs is required.
type TrainConfig struct {
	Epochs    int       // passes over the data; required, >= 1
	BatchSize int       // records per step; 0 means 100
	Optimizer Optimizer // Adam (default) or SGD
	LearnRate float64   // 0 means 1e-3
	Momentum  float64   // SGD only, in [0, 1); must be 0 with Adam
	// Seed drives shuffling and the sampler's noise: the same seed, data
	// and configuration give the same parameters bit for bit.
	Seed uint64
	// Beta weighs the KL term at each step; nil means schedule.Constant{1}
	// (or 0 when Capacity is set). A schedule with a Validate method is
	// validated up front; any schedule's value must be finite and >= 0 at
	// every step.
	Beta schedule.Beta
	// FreeBits, when Lambda > 0, floors the batch-mean KL of every latent
	// dimension at Lambda nats (Kingma et al. 2016). With a prior that has
	// no closed-form KL the divergence does not split by dimension, and the
	// batch-mean total KL is floored at Lambda*D instead.
	FreeBits schedule.FreeBits
	// Capacity, when Gamma > 0, adds Gamma*|KL - C(step)| (Burgess et al.
	// 2018).
	Capacity schedule.Capacity
	// ClipNorm > 0 rescales the gradient of all parameters together when
	// its L2 norm exceeds ClipNorm; 0 means no clipping. It must be finite.
	ClipNorm float64
	// Validation data, evaluated (negative ELBO, one sample, fixed seed)
	// after each epoch. If set, it must hold at least one record.
	Validation *dataset.Set
	// Patience > 0 stops training after that many epochs without a better
	// validation negative ELBO. Needs Validation.
	Patience int
	// RestoreBest puts back the parameters of the epoch with the best
	// validation negative ELBO when training ends. Needs Validation.
	RestoreBest bool
	// CheckpointPath, if set, is written atomically after every epoch that
	// improves the validation negative ELBO (every epoch without
	// Validation). A failed run leaves the last good file as it was. Its
	// directory must exist when Train starts, and the model must be one
	// that Save can write with SaveOptions: Train checks both before the
	// first step.
	CheckpointPath string
	// SaveOptions are passed to Save for CheckpointPath; a model with a
	// user-written part that does not describe itself needs
	// AllowWeightsOnly here.
	SaveOptions []SaveOption
	// OnStep, if set, is called after every optimiser step.
	OnStep func(StepInfo)
	// OnEpoch, if set, is called after every epoch; a non-nil error stops
	// training and is returned.
	OnEpoch func(EpochInfo) error
}

// StepInfo reports one optimiser step. Terms are batch means per record.
type StepInfo struct {
	Epoch, Step    int // Epoch counts from 1; Step from 0 across epochs
	Loss           float64
	Reconstruction float64 // -E_q[log p(x|z)]
	KL             float64 // the KL before free bits or capacity
	Beta           float64
	SamplesPerSec  float64
}

// EpochInfo reports one epoch. Terms are means per record over the epoch.
type EpochInfo struct {
	Epoch          int
	Steps          int
	Loss           float64
	Reconstruction float64
	KL             float64
	Beta           float64 // at the epoch's last step
	// Validation is the validation negative ELBO, NaN without validation data.
	Validation    float64
	Best          bool // the best validation so far (always true without validation)
	Duration      time.Duration
	SamplesPerSec float64
}

func (c *TrainConfig) validate(m *Model, data *dataset.Set) error {
	if c.Epochs < 1 {
		return configError("Epochs", "%d, want >= 1", c.Epochs)
	}
	if c.BatchSize == 0 {
		c.BatchSize = 100
	}
	if c.BatchSize < 1 {
		return configError("BatchSize", "%d, want >= 1", c.BatchSize)
	}
	if c.LearnRate == 0 {
		c.LearnRate = 1e-3
	}
	if !(c.LearnRate > 0) || math.IsInf(c.LearnRate, 0) {
		return configError("LearnRate", "%v, want > 0", c.LearnRate)
	}
	if c.Optimizer != Adam && c.Optimizer != SGD {
		return configError("Optimizer", "unknown value %d", c.Optimizer)
	}
	// Written so that NaN fails every comparison and is rejected.
	if !(c.Momentum >= 0 && c.Momentum < 1) {
		return configError("Momentum", "%v, want 0 <= momentum < 1", c.Momentum)
	}
	if c.Momentum != 0 && c.Optimizer != SGD {
		return configError("Momentum", "%v is for SGD only; Adam keeps its own moments", c.Momentum)
	}
	if err := c.FreeBits.Validate(); err != nil {
		return configWrap("FreeBits", err)
	}
	if err := c.Capacity.Validate(); err != nil {
		return configWrap("Capacity", err)
	}
	if c.Beta == nil {
		if c.Capacity.Gamma > 0 {
			c.Beta = schedule.Constant{Value: 0}
		} else {
			c.Beta = schedule.Constant{Value: 1}
		}
	}
	if v, ok := c.Beta.(interface{ Validate() error }); ok {
		if err := v.Validate(); err != nil {
			return configWrap("Beta", err)
		}
	}
	if !(c.ClipNorm >= 0) || math.IsInf(c.ClipNorm, 0) {
		return configError("ClipNorm", "%v, want a finite value >= 0 (0 turns clipping off)", c.ClipNorm)
	}
	if (c.Patience > 0 || c.RestoreBest) && c.Validation == nil {
		return configError("Validation", "Patience and RestoreBest need validation data")
	}
	if c.Patience < 0 {
		return configError("Patience", "%d, want >= 0", c.Patience)
	}
	if c.CheckpointPath != "" {
		// The file is written after the first epoch; a directory that
		// is missing would only show then.
		dir := filepath.Dir(c.CheckpointPath)
		if st, err := os.Stat(dir); err != nil {
			return configWrap("CheckpointPath", err)
		} else if !st.IsDir() {
			return configError("CheckpointPath", "%s is not a directory", dir)
		}
		if st, err := os.Stat(c.CheckpointPath); err == nil && st.IsDir() {
			return configError("CheckpointPath", "%s is a directory", c.CheckpointPath)
		}
		if err := m.SaveTo(io.Discard, c.SaveOptions...); err != nil {
			return configWrap("CheckpointPath", err)
		}
	}
	if err := m.checkData("Train", data); err != nil {
		return err
	}
	if data.Len() == 0 {
		return configError("data", "no records")
	}
	if c.Validation != nil {
		if err := m.checkData("Train", c.Validation); err != nil {
			return fmt.Errorf("validation: %w", err)
		}
		if c.Validation.Len() == 0 {
			return configError("Validation", "no records")
		}
	}
	return nil
}

// Train fits the model to data. A model whose parts the lean training path
// runs (see the package documentation) trains without graphs, on buffers
// sized once for BatchSize, and uses two cores for batches of 64 records
// or more when GOMAXPROCS allows; any other model builds one training graph
// and reuses it for every step, a last batch smaller than BatchSize running
// through it with its padding rows weighted zero. The same seed, data and
// configuration give the same parameters bit for bit on either path, on
// any number of cores. Train stops early, returning the history so far and
// the context's error, when ctx is done.
func (m *Model) Train(ctx context.Context, data *dataset.Set, cfg TrainConfig) ([]EpochInfo, error) {
	if ctx == nil {
		ctx = context.Background()
	}
	if err := cfg.validate(m, data); err != nil {
		return nil, err
	}
	// The lean path when the model's parts allow it (train_lean.go), else
	// one gorgonia graph for every step.
	var lt leanTrainer
	var p *program
	if !m.graphTrain {
		lt, _ = m.newLeanTrainer(cfg.BatchSize)
	}
	var weights, grads []*tensor.Dense
	var names []string
	var xT, epsT *tensor.Dense
	sc := stepScalars{freeBits: cfg.FreeBits.Lambda > 0, lambda: cfg.FreeBits.Lambda, capacity: cfg.Capacity.Gamma > 0, gamma: cfg.Capacity.Gamma}
	if lt != nil {
		lt.start()
		defer lt.close()
		for _, prm := range lt.params() {
			weights, names = append(weights, prm.Value), append(names, prm.Name)
		}
		grads = lt.grads()
		epsT = tensor.New(tensor.WithShape(cfg.BatchSize, m.latent), tensor.Of(m.dtype))
	} else {
		key := programKey{kind: kindTrain, batch: cfg.BatchSize, k: 1, freeBits: sc.freeBits, capacity: sc.capacity}
		m.mu.Lock()
		var err error
		p, err = m.build(key)
		m.mu.Unlock()
		if err != nil {
			return nil, err
		}
		if p.lambda != nil {
			lambda := cfg.FreeBits.Lambda
			if p.klDimAvg == nil {
				lambda *= float64(m.latent) // one group: the total KL
			}
			if err := setScalar(p.lambda, lambda); err != nil {
				return nil, err
			}
		}
		if p.capGamma != nil {
			if err := setScalar(p.capGamma, cfg.Capacity.Gamma); err != nil {
				return nil, err
			}
		}
		for _, prm := range p.scope.Params() {
			weights, names = append(weights, prm.Value), append(names, prm.Name)
		}
		grads = make([]*tensor.Dense, len(p.paramNodes))
		xT, epsT = p.x, p.eps
	}
	opt := newUpdater(cfg)
	rng := rand.New(rand.NewPCG(cfg.Seed, 0x5eed))
	noise := rand.New(rand.NewPCG(cfg.Seed, 0x0153))

	// runStep computes the loss terms and the gradients of one batch.
	runStep := func(idx []int, step int, beta float64) (loss, rec, kl float64, err error) {
		if lt != nil {
			// The lean path's shards convert their own records; the
			// noise comes from the stream the feeder would draw it from.
			if err := layers.FillNormal(noise, epsT); err != nil {
				return 0, 0, 0, err
			}
			sc.beta = beta
			sc.target = cfg.Capacity.Target(step)
			recon, kl, loss, err := lt.step(data, idx, epsT, sc)
			return loss, -recon, kl, err
		}
		if err := m.finishInputs(p, data, idx); err != nil {
			return 0, 0, 0, err
		}
		p.mask.Zero()
		for i := range idx {
			setAt(p.mask, i, 1)
		}
		if err := setScalar(p.invCount, 1/float64(len(idx))); err != nil {
			return 0, 0, 0, err
		}
		if err := setScalar(p.beta, beta); err != nil {
			return 0, 0, 0, err
		}
		if p.capTarget != nil {
			if err := setScalar(p.capTarget, cfg.Capacity.Target(step)); err != nil {
				return 0, 0, 0, err
			}
		}
		if err := p.run(); err != nil {
			return 0, 0, 0, fmt.Errorf("vae.Train: step %d: %w", step, err)
		}
		loss, rec, kl = p.scalarValue(p.loss), -p.scalarValue(p.recon), p.scalarValue(p.klAvg)
		if err := gradients(p.paramNodes, grads); err != nil {
			return 0, 0, 0, fmt.Errorf("vae.Train: step %d: %w", step, err)
		}
		return loss, rec, kl, nil
	}
	// clearGrads readies the gradients for the next step: gorgonia adds
	// each run's gradients to what the gradient tensors hold; the lean
	// path overwrites them.
	clearGrads := func() {
		if lt != nil {
			return
		}
		for _, g := range grads {
			g.Zero()
		}
	}

	var history []EpochInfo
	best := math.Inf(1)
	var bestParams []*tensor.Dense
	sinceBest := 0
	step := 0
	n := data.Len()
	for epoch := 1; epoch <= cfg.Epochs; epoch++ {
		start := time.Now()
		batches, err := dataset.Batches(n, cfg.BatchSize, rng)
		if err != nil {
			return history, err
		}
		var sumLoss, sumRec, sumKL float64
		var beta float64
		var feed *feeder // the graph path's
		if lt == nil {
			feed = newFeeder(data, batches, m.width, xT, epsT, noise)
		}
		err = func() error {
			if feed != nil {
				defer feed.close()
			}
			for _, idx := range batches {
				if err := ctx.Err(); err != nil {
					return err
				}
				t0 := time.Now()
				if feed != nil {
					if err := feed.next(xT, epsT); err != nil {
						return err
					}
				}
				beta = cfg.Beta.At(step)
				if beta < 0 || math.IsInf(beta, 0) {
					// A user schedule without Validate; NaN is left to the
					// non-finite check of the loss.
					return configError("Beta", "At(%d) = %v, want a finite value >= 0", step, beta)
				}
				loss, rec, kl, err := runStep(idx, step, beta)
				if err != nil {
					return err
				}
				for _, term := range []struct {
					name string
					v    float64
				}{{"reconstruction", rec}, {"KL", kl}, {"loss", loss}} {
					if math.IsNaN(term.v) || math.IsInf(term.v, 0) {
						return fmt.Errorf("vae.Train: epoch %d, step %d: the %s term is %v: %w", epoch, step, term.name, term.v, ErrNonFinite)
					}
				}
				var bad int
				if lt != nil {
					bad, err = lt.update(opt, cfg.ClipNorm)
				} else {
					if cfg.ClipNorm > 0 {
						clipGradients(grads, cfg.ClipNorm)
					}
					bad, err = opt.step(weights, grads)
				}
				if err != nil {
					return fmt.Errorf("vae.Train: step %d: %w", step, err)
				}
				if bad >= 0 {
					// The updater has put every parameter back as it was
					// after the last good step.
					return fmt.Errorf("vae.Train: epoch %d, step %d: the update of parameter %q is not finite: %w",
						epoch, step, names[bad], ErrNonFinite)
				}
				clearGrads()
				c := float64(len(idx))
				sumLoss += loss * c
				sumRec += rec * c
				sumKL += kl * c
				if cfg.OnStep != nil {
					cfg.OnStep(StepInfo{Epoch: epoch, Step: step, Loss: loss, Reconstruction: rec, KL: kl, Beta: beta,
						SamplesPerSec: c / time.Since(t0).Seconds()})
				}
				step++
			}
			return nil
		}()
		if err != nil {
			return history, err
		}
		dur := time.Since(start)
		info := EpochInfo{Epoch: epoch, Steps: len(batches), Loss: sumLoss / float64(n), Reconstruction: sumRec / float64(n),
			KL: sumKL / float64(n), Beta: beta, Validation: math.NaN(), Duration: dur, SamplesPerSec: float64(n) / dur.Seconds()}
		improved := true
		if cfg.Validation != nil {
			rep, err := m.Evaluate(ctx, cfg.Validation, EvalOptions{K: 1, Seed: cfg.Seed})
			if err != nil {
				return history, fmt.Errorf("vae.Train: epoch %d: validation: %w", epoch, err)
			}
			info.Validation = rep.NegELBO
			improved = rep.NegELBO < best
		}
		info.Best = improved
		if improved {
			best = info.Validation
			sinceBest = 0
			if cfg.RestoreBest {
				bestParams = m.snapshot()
			}
			if cfg.CheckpointPath != "" {
				if err := m.Save(cfg.CheckpointPath, cfg.SaveOptions...); err != nil {
					return history, fmt.Errorf("vae.Train: epoch %d: %w", epoch, err)
				}
			}
		} else {
			sinceBest++
		}
		history = append(history, info)
		if cfg.OnEpoch != nil {
			if err := cfg.OnEpoch(info); err != nil {
				return history, err
			}
		}
		if cfg.Patience > 0 && sinceBest >= cfg.Patience {
			break
		}
	}
	if cfg.RestoreBest && bestParams != nil {
		m.restore(bestParams)
	}
	return history, nil
}

func castTo(dt tensor.Dtype, v float64) any {
	if dt == tensor.Float32 {
		return float32(v)
	}
	return v
}

// gradients collects the gradient tensors of the parameter nodes.
func gradients(nodes []*G.Node, out []*tensor.Dense) error {
	for i, n := range nodes {
		g, err := n.Grad()
		if err != nil {
			return fmt.Errorf("gradient of %s: %w", n.Name(), err)
		}
		d, ok := g.(*tensor.Dense)
		if !ok {
			return fmt.Errorf("gradient of %s is a %T", n.Name(), g)
		}
		out[i] = d
	}
	return nil
}

// clipGradients rescales all gradients together so that their joint L2 norm
// is at most maxNorm.
func clipGradients(grads []*tensor.Dense, maxNorm float64) {
	var sq float64
	for _, d := range grads {
		switch x := d.Data().(type) {
		case []float64:
			for _, v := range x {
				sq += v * v
			}
		case []float32:
			for _, v := range x {
				sq += float64(v) * float64(v)
			}
		}
	}
	norm := math.Sqrt(sq)
	if norm <= maxNorm || norm == 0 {
		return
	}
	scale := maxNorm / norm
	for _, d := range grads {
		switch x := d.Data().(type) {
		case []float64:
			for i := range x {
				x[i] *= scale
			}
		case []float32:
			for i := range x {
				x[i] *= float32(scale)
			}
		}
	}
}

// snapshot copies every parameter's values.
func (m *Model) snapshot() []*tensor.Dense {
	out := make([]*tensor.Dense, len(m.params))
	for i, p := range m.params {
		out[i] = p.Value.Clone().(*tensor.Dense)
	}
	return out
}

// restore copies a snapshot back into the parameters, in place, so every
// compiled graph sees it.
func (m *Model) restore(s []*tensor.Dense) {
	for i, p := range m.params {
		copyInto(p.Value, s[i])
	}
}

func copyInto(dst, src *tensor.Dense) {
	switch d := dst.Data().(type) {
	case []float64:
		copy(d, src.Data().([]float64))
	case []float32:
		copy(d, src.Data().([]float32))
	}
}
