package vae

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// maxInferBatch bounds the rows an inference program handles at once.
// Inference programs come in power-of-two batch sizes up to this bound, so a
// model keeps at most a handful of compiled graphs per kind.
const maxInferBatch = 128

// maxSampleRows bounds K times the batch of an importance-sampling program
// run, so that memory stays bounded for any K (the decoder output alone is
// K*batch*F values) and a cancelled context is noticed within one run of
// at most this many rows. Score and Evaluate split larger K into chunks.
const maxSampleRows = 2048

// inferLimits holds the bounds of the inference loops. The methods use
// defaultInferLimits; tests shrink the bounds and watch the runs.
type inferLimits struct {
	// sampleRows bounds K times the batch of one program run.
	sampleRows int
	// beforeRun, when not nil, is called before every program run with
	// the program's key (tests count runs with it).
	beforeRun func(programKey)
	// lean runs the call on the model's lean plan when it has one (see
	// leanLimits); the bounds above then do not apply.
	lean bool
}

func defaultInferLimits() inferLimits {
	return inferLimits{sampleRows: maxSampleRows}
}

// inferBatch returns the batch size of the program for the next n records
// with K samples each: a power of two, at most maxInferBatch and, for K > 1,
// at most rows/K (but at least 1).
func inferBatch(n, k, rows int) int {
	limit := maxInferBatch
	for limit > 1 && limit*k > rows {
		limit /= 2
	}
	b := 1
	for b < n && b < limit {
		b *= 2
	}
	return b
}

// checkData validates that data fits the model.
func (m *Model) checkData(where string, data *dataset.Set) error {
	if data == nil {
		return fmt.Errorf("vae.%s: data: nil: %w", where, layers.ErrInvalidArgument)
	}
	if data.Features() != m.width {
		return fmt.Errorf("vae.%s: data: %d features per record, model wants %d: %w", where, data.Features(), m.width, layers.ErrInvalidArgument)
	}
	if err := m.checkValues(where, data); err != nil {
		return err
	}
	if m.cfg.Classes > 0 {
		if !data.HasLabels() {
			return fmt.Errorf("vae.%s: data: conditional model needs labels: %w", where, ErrLabel)
		}
		for i := 0; i < data.Len(); i++ {
			if l := data.Label(i); l < 0 || l >= m.cfg.Classes {
				return fmt.Errorf("vae.%s: data: record %d has label %d, want 0..%d: %w", where, i, l, m.cfg.Classes-1, ErrLabel)
			}
		}
	}
	return nil
}

// checkValues reports the first value of data that the model cannot
// represent: for a float32 model a value beyond the float32 range, which
// would become infinite in the graph and turn its record's results into
// NaN (and a NaN or infinity, which a dataset.Set never holds). Each record
// is converted exactly as the graphs receive it. The error names the
// record and feature and wraps dataset.ErrInvalidData.
func (m *Model) checkValues(where string, data *dataset.Set) error {
	f := data.Features()
	var row32 []float32
	var row64 []float64
	var dst any
	if m.dtype == tensor.Float32 {
		row32 = make([]float32, f)
		dst = row32
	} else {
		row64 = make([]float64, f)
		dst = row64
	}
	idx := []int{0}
	for i := 0; i < data.Len(); i++ {
		idx[0] = i
		if err := data.Fill(dst, idx); err != nil {
			return fmt.Errorf("vae.%s: data: %w", where, err)
		}
		for j := 0; j < f; j++ {
			var v float64
			if row32 != nil {
				v = float64(row32[j])
			} else {
				v = row64[j]
			}
			if m.cols != nil {
				// NaN marks a missing entry, which a columns model skips.
				orig := data.Row(i)[j]
				msg := m.cols.CheckValue(j, v)
				if msg == "" && !math.IsNaN(orig) {
					msg = m.unrepresentable(orig)
				}
				if msg != "" {
					name := m.cols.Schema()[j].Name
					return fmt.Errorf("vae.%s: data: record %d, column %d (%q): value %v %s: %w", where, i, j, name, orig, msg, dataset.ErrInvalidData)
				}
				continue
			}
			if math.IsNaN(v) || math.IsInf(v, 0) {
				orig := data.Row(i)[j]
				return fmt.Errorf("vae.%s: data: record %d, feature %d: value %v %s: %w", where, i, j, orig, m.unrepresentable(orig), dataset.ErrInvalidData)
			}
		}
	}
	return nil
}

// unrepresentable says why v cannot enter the model's graphs, or returns
// "" when it can.
func (m *Model) unrepresentable(v float64) string {
	switch {
	case math.IsNaN(v) || math.IsInf(v, 0):
		return "is not finite"
	case m.dtype == tensor.Float32 && math.IsInf(float64(float32(v)), 0):
		return fmt.Sprintf("is beyond the float32 range (magnitude at most %v)", math.MaxFloat32)
	}
	return ""
}

// checkLabels validates explicit labels for n rows.
func (m *Model) checkLabels(where string, labels []int, n int) error {
	if m.cfg.Classes == 0 {
		if labels != nil {
			return fmt.Errorf("vae.%s: labels: %w", where, ErrNotConditional)
		}
		return nil
	}
	if len(labels) != n {
		return fmt.Errorf("vae.%s: labels: have %d, want one per row (%d): %w", where, len(labels), n, ErrLabel)
	}
	for i, l := range labels {
		if l < 0 || l >= m.cfg.Classes {
			return fmt.Errorf("vae.%s: labels: row %d has label %d, want 0..%d: %w", where, i, l, m.cfg.Classes-1, ErrLabel)
		}
	}
	return nil
}

// fillInputs writes records idx of data (padded with zero rows up to the
// program's batch) and their labels into p's input tensors, repeating them
// K times where the program needs that.
func (m *Model) fillInputs(p *program, data *dataset.Set, idx []int) error {
	if p.x != nil {
		p.x.Zero()
		if err := fillPrefix(p.x, data, idx, m.width); err != nil {
			return err
		}
	}
	return m.finishInputs(p, data, idx)
}

// finishInputs fills what the program needs besides x once the batch's
// records are in x (zero beyond them): the model-input layout of a columns
// model, the K-fold copy of x and the labels.
func (m *Model) finishInputs(p *program, data *dataset.Set, idx []int) error {
	b, k := p.key.batch, p.key.k
	if p.x != nil {
		if p.xEnc != nil {
			// Padding rows of a columns model are all missing, so
			// they add exactly 0 (a zero could be outside a column's
			// support, and -Inf times a zero weight is NaN).
			fillRange(p.x, len(idx)*m.width, b*m.width, math.NaN())
			m.encodeInputs(p, len(idx))
		}
		if p.xRep != nil {
			repeatBlock(p.xRep, p.x, k)
		}
	}
	if m.cfg.Classes > 0 {
		labels := make([]int, b)
		for i, r := range idx {
			labels[i] = data.Label(r)
		}
		m.fillLabels(p, labels)
	}
	return nil
}

// encodeInputs writes the model-input layout of the first rows records of
// p.x into p.xEnc (padding rows zero).
func (m *Model) encodeInputs(p *program, rows int) {
	f, w := m.width, m.cols.EncoderWidth()
	x := make([]float64, f)
	enc := make([]float64, w)
	p.xEnc.Zero()
	f32, _ := p.x.Data().([]float32)
	f64, _ := p.x.Data().([]float64)
	for i := 0; i < rows; i++ {
		for j := range x {
			if f32 != nil {
				x[j] = float64(f32[i*f+j])
			} else {
				x[j] = f64[i*f+j]
			}
		}
		m.cols.EncodeRow(x, enc)
		for j, v := range enc {
			setAt(p.xEnc, i*w+j, v)
		}
	}
}

// fillLabels writes one-hot labels (and label planes) for a full batch.
func (m *Model) fillLabels(p *program, labels []int) {
	c := m.cfg.Classes
	if p.y != nil {
		p.y.Zero()
		for i, l := range labels {
			setAt(p.y, i*c+l, 1)
		}
		if p.yRep != nil {
			repeatBlock(p.yRep, p.y, p.key.k)
		}
	}
	if p.planes != nil {
		p.planes.Zero()
		hw := m.cfg.InputShape[1] * m.cfg.InputShape[2]
		for i, l := range labels {
			fillRange(p.planes, (i*c+l)*hw, (i*c+l+1)*hw, 1)
		}
	}
}

// fillRange sets elements [from, to) of t to v.
func fillRange(t *tensor.Dense, from, to int, v float64) {
	switch d := t.Data().(type) {
	case []float64:
		for i := from; i < to; i++ {
			d[i] = v
		}
	case []float32:
		for i := from; i < to; i++ {
			d[i] = float32(v)
		}
	}
}

func setAt(t *tensor.Dense, i int, v float64) {
	switch d := t.Data().(type) {
	case []float64:
		d[i] = v
	case []float32:
		d[i] = float32(v)
	}
}

func fillPrefix(t *tensor.Dense, data *dataset.Set, idx []int, width int) error {
	switch d := t.Data().(type) {
	case []float64:
		return data.Fill(d[:len(idx)*width], idx)
	case []float32:
		return data.Fill(d[:len(idx)*width], idx)
	}
	return fmt.Errorf("vae: unsupported dtype %v", t.Dtype())
}

// repeatBlock writes src K times one after the other into dst.
func repeatBlock(dst, src *tensor.Dense, k int) {
	switch d := dst.Data().(type) {
	case []float64:
		s := src.Data().([]float64)
		for i := 0; i < k; i++ {
			copy(d[i*len(s):], s)
		}
	case []float32:
		s := src.Data().([]float32)
		for i := 0; i < k; i++ {
			copy(d[i*len(s):], s)
		}
	}
}

// fillNoise fills the (K*B, D) noise tensor: row s*B+i, the noise of
// sample s of the record in batch row i, takes the next D standard normals
// of rngs[i]. Each record's generator is seeded from its key alone (see
// ScoreOptions.Keys) and drawn sample by sample, so its noise does not
// depend on batching or chunking. Padding rows, and every row when rngs is
// nil, get zero noise.
func fillNoise(t *tensor.Dense, rngs []*rand.Rand, b, k, d int) {
	t.Zero()
	f32, _ := t.Data().([]float32)
	f64, _ := t.Data().([]float64)
	for i, rng := range rngs {
		for s := 0; s < k; s++ {
			off := (s*b + i) * d
			for j := 0; j < d; j++ {
				v := rng.NormFloat64()
				if f32 != nil {
					f32[off+j] = float32(v)
				} else {
					f64[off+j] = v
				}
			}
		}
	}
}

// forChunks runs fn over consecutive chunks of n records, each with a
// program of the given kind and K.
func (m *Model) forChunks(ctx context.Context, kind programKind, n, k int, lim inferLimits, fn func(p *program, first int, idx []int) error) error {
	if ctx == nil {
		ctx = context.Background()
	}
	for first := 0; first < n; {
		if err := ctx.Err(); err != nil {
			return err
		}
		b := inferBatch(n-first, k, lim.sampleRows)
		count := min(b, n-first)
		p, err := m.acquire(programKey{kind: kind, batch: b, k: k})
		if err != nil {
			return err
		}
		idx := make([]int, count)
		for i := range idx {
			idx[i] = first + i
		}
		if lim.beforeRun != nil {
			lim.beforeRun(p.key)
		}
		m.engine.RLock()
		err = fn(p, first, idx)
		m.engine.RUnlock()
		m.release(p)
		if err != nil {
			return err
		}
		first += count
	}
	return nil
}

// Encode returns the posterior mean and standard deviation of every record,
// each an (N, D) matrix.
func (m *Model) Encode(ctx context.Context, data *dataset.Set) (mean, sigma *mat.Dense, err error) {
	if err := m.checkData("Encode", data); err != nil {
		return nil, nil, err
	}
	n, d := data.Len(), m.latent
	if n == 0 {
		return nil, nil, fmt.Errorf("vae.Encode: data: no records: %w", layers.ErrInvalidArgument)
	}
	if m.lean != nil {
		return m.leanEncode(ctx, data)
	}
	mean, sigma = mat.NewDense(n, d, nil), mat.NewDense(n, d, nil)
	err = m.forChunks(ctx, kindEncode, n, 1, defaultInferLimits(), func(p *program, first int, idx []int) error {
		if err := m.fillInputs(p, data, idx); err != nil {
			return err
		}
		if err := p.run(); err != nil {
			return err
		}
		mu, lv := p.values(p.mu), p.values(p.logVar)
		for i := range idx {
			for j := 0; j < d; j++ {
				mean.Set(first+i, j, mu[i*d+j])
				sigma.Set(first+i, j, math.Exp(0.5*lv[i*d+j]))
			}
		}
		return nil
	})
	if err != nil {
		return nil, nil, err
	}
	return mean, sigma, nil
}

// Decode maps latent rows z (N, D) to the likelihood's mean, (N, F): pixel
// probabilities for Bernoulli, means for Gaussian. A conditional model needs
// one label per row; an unconditional one takes nil.
func (m *Model) Decode(ctx context.Context, z mat.Matrix, labels []int) (*mat.Dense, error) {
	if z == nil {
		return nil, fmt.Errorf("vae.Decode: z: nil: %w", layers.ErrInvalidArgument)
	}
	n, d := z.Dims()
	if d != m.latent || n == 0 {
		return nil, fmt.Errorf("vae.Decode: z: shape (%d, %d), want (N >= 1, %d): %w", n, d, m.latent, layers.ErrInvalidArgument)
	}
	if err := m.checkLabels("Decode", labels, n); err != nil {
		return nil, err
	}
	if m.lean != nil {
		return m.leanDecode(ctx, z, labels)
	}
	out := mat.NewDense(n, m.width, nil)
	err := m.forChunks(ctx, kindDecode, n, 1, defaultInferLimits(), func(p *program, first int, idx []int) error {
		p.z.Zero()
		for i := range idx {
			for j := 0; j < d; j++ {
				v := z.At(first+i, j)
				if bad := m.unrepresentable(v); bad != "" {
					return fmt.Errorf("vae.Decode: z: row %d, column %d: value %v %s: %w", first+i, j, v, bad, layers.ErrInvalidArgument)
				}
				setAt(p.z, i*d+j, v)
			}
		}
		if m.cfg.Classes > 0 {
			batchLabels := make([]int, p.key.batch)
			copy(batchLabels, labels[first:first+len(idx)])
			m.fillLabels(p, batchLabels)
		}
		if err := p.run(); err != nil {
			return err
		}
		copyRows(out, first, len(idx), p.values(p.mean))
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

func copyRows(dst *mat.Dense, first, count int, v []float64) {
	_, w := dst.Dims()
	for i := 0; i < count; i++ {
		dst.SetRow(first+i, v[i*w:(i+1)*w])
	}
}

// Reconstruct encodes every record to its posterior mean and decodes it,
// returning the likelihood's mean (N, F). It is deterministic.
func (m *Model) Reconstruct(ctx context.Context, data *dataset.Set) (*mat.Dense, error) {
	if err := m.checkData("Reconstruct", data); err != nil {
		return nil, err
	}
	n := data.Len()
	if n == 0 {
		return nil, fmt.Errorf("vae.Reconstruct: data: no records: %w", layers.ErrInvalidArgument)
	}
	if m.lean != nil {
		return m.leanReconstruct(ctx, data)
	}
	out := mat.NewDense(n, m.width, nil)
	err := m.forChunks(ctx, kindReconstruct, n, 1, defaultInferLimits(), func(p *program, first int, idx []int) error {
		if err := m.fillInputs(p, data, idx); err != nil {
			return err
		}
		if err := p.run(); err != nil {
			return err
		}
		copyRows(out, first, len(idx), p.values(p.mean))
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// SamplePrior draws n latent vectors from the prior, (n, D).
func (m *Model) SamplePrior(n int, seed uint64) (*mat.Dense, error) {
	if n < 1 {
		return nil, fmt.Errorf("vae.SamplePrior: n: %d, want >= 1: %w", n, layers.ErrInvalidArgument)
	}
	// A prior may compile a graph of its own over the model's parameters
	// to sample (the VampPrior runs the encoder); compiling writes to the
	// shared tensors, so it excludes running programs like acquire does.
	// The other built-in priors only read their parameters.
	lock, unlock := m.engine.Lock, m.engine.Unlock
	switch m.cfg.Prior.(type) {
	case *priors.StandardNormal, *priors.Diagonal, *priors.Mixture:
		lock, unlock = m.engine.RLock, m.engine.RUnlock
	}
	lock()
	t, err := m.cfg.Prior.Sample(rand.New(rand.NewPCG(seed, 0x9e3779b97f4a7c15)), n)
	unlock()
	if err != nil {
		return nil, fmt.Errorf("vae.SamplePrior: %w", err)
	}
	v := make([]float64, 0, n*m.latent)
	switch d := t.Data().(type) {
	case []float64:
		v = append(v, d...)
	case []float32:
		for _, x := range d {
			v = append(v, float64(x))
		}
	}
	if len(v) != n*m.latent {
		return nil, fmt.Errorf("vae.SamplePrior: prior returned %d values, want %d", len(v), n*m.latent)
	}
	return mat.NewDense(n, m.latent, v), nil
}

// Generate draws n latent vectors from the prior and decodes them. A
// conditional model generates every row under the given labels (one per
// row); an unconditional one takes nil.
func (m *Model) Generate(ctx context.Context, n int, labels []int, seed uint64) (*mat.Dense, error) {
	if n < 1 {
		return nil, fmt.Errorf("vae.Generate: n: %d, want >= 1: %w", n, layers.ErrInvalidArgument)
	}
	if err := m.checkLabels("Generate", labels, n); err != nil {
		return nil, err
	}
	z, err := m.SamplePrior(n, seed)
	if err != nil {
		return nil, err
	}
	return m.Decode(ctx, z, labels)
}

// Interpolate decodes steps points on the straight line between the
// posterior means of records i and j of data (both ends included). A
// conditional model decodes every point under record i's label.
func (m *Model) Interpolate(ctx context.Context, data *dataset.Set, i, j, steps int) (*mat.Dense, error) {
	if err := m.checkData("Interpolate", data); err != nil {
		return nil, err
	}
	if i < 0 || j < 0 || i >= data.Len() || j >= data.Len() {
		return nil, fmt.Errorf("vae.Interpolate: records %d and %d: out of range 0..%d: %w", i, j, data.Len()-1, layers.ErrInvalidArgument)
	}
	if steps < 2 {
		return nil, fmt.Errorf("vae.Interpolate: steps: %d, want >= 2: %w", steps, layers.ErrInvalidArgument)
	}
	pair, err := data.Subset([]int{i, j})
	if err != nil {
		return nil, err
	}
	mean, _, err := m.Encode(ctx, pair)
	if err != nil {
		return nil, err
	}
	z := mat.NewDense(steps, m.latent, nil)
	for s := 0; s < steps; s++ {
		t := float64(s) / float64(steps-1)
		for d := 0; d < m.latent; d++ {
			z.Set(s, d, (1-t)*mean.At(0, d)+t*mean.At(1, d))
		}
	}
	var labels []int
	if m.cfg.Classes > 0 {
		labels = make([]int, steps)
		for s := range labels {
			labels[s] = data.Label(i)
		}
	}
	return m.Decode(ctx, z, labels)
}
