package dataset

import (
	"math"
)

// Standardizer maps each feature to zero mean and unit standard deviation:
// y = (x - Mean[j]) / Std[j]. Its fields are exported and tagged so it can
// be stored as JSON (for example in checkpoint metadata) and applied again
// when serving.
type Standardizer struct {
	Mean []float64 `json:"mean"`
	Std  []float64 `json:"std"`
}

// FitStandardizer computes each feature's mean and population standard
// deviation (dividing by N, not N-1) over the records of s. A feature whose
// standard deviation is zero, or below 1e-12 times the magnitude of its mean
// (rounding noise on a constant column), gets Std 1, so it is only
// centred and never divided by a near-zero number.
func FitStandardizer(s *Set) (Standardizer, error) {
	const where = "dataset.FitStandardizer"
	if s == nil {
		return Standardizer{}, argError(where, "s", "nil Set")
	}
	if s.n == 0 {
		return Standardizer{}, argError(where, "s", "no records")
	}
	f := s.f
	// Per feature over its observed (non-NaN) entries; a feature with none
	// gets mean 0 and Std 1.
	cnt := make([]float64, f)
	mean := make([]float64, f)
	for i := range s.n {
		for j, v := range s.x[i*f : (i+1)*f] {
			if !math.IsNaN(v) {
				mean[j] += v
				cnt[j]++
			}
		}
	}
	for j := range mean {
		if cnt[j] > 0 {
			mean[j] /= cnt[j]
		}
	}
	// Two-pass, corrected sum of squares: sum d^2 - (sum d)^2 / n.
	ss := make([]float64, f)
	comp := make([]float64, f)
	for i := range s.n {
		for j, v := range s.x[i*f : (i+1)*f] {
			if math.IsNaN(v) {
				continue
			}
			d := v - mean[j]
			ss[j] += d * d
			comp[j] += d
		}
	}
	std := make([]float64, f)
	for j := range std {
		n := math.Max(cnt[j], 1)
		v := (ss[j] - comp[j]*comp[j]/n) / n
		sd := math.Sqrt(math.Max(v, 0))
		if sd == 0 || sd <= 1e-12*math.Abs(mean[j]) || math.IsInf(sd, 0) {
			sd = 1
		}
		std[j] = sd
		mean[j] += comp[j] / n // second-pass correction of the mean's rounding
	}
	return Standardizer{Mean: mean, Std: std}, nil
}

// FitStandardizerSchema is FitStandardizer for records described by sc:
// only real columns are standardised; the others (positive, count,
// binary, categorical, whose likelihoods need the raw values) get Mean 0
// and Std 1, so Apply leaves them unchanged.
func FitStandardizerSchema(s *Set, sc Schema) (Standardizer, error) {
	const where = "dataset.FitStandardizerSchema"
	z, err := FitStandardizer(s)
	if err != nil {
		return z, err
	}
	if len(sc.Columns) != len(z.Mean) {
		return Standardizer{}, argError(where, "sc", "%d columns, the set has %d features", len(sc.Columns), len(z.Mean))
	}
	for j, c := range sc.Columns {
		if c.Kind != KindReal {
			z.Mean[j], z.Std[j] = 0, 1
		}
	}
	return z, nil
}

// Validate checks that Mean and Std have the same, non-zero length, every
// mean is finite and every Std is finite and positive (a Standardizer read
// from JSON should be validated before use; Apply and Invert do it).
func (z Standardizer) Validate() error {
	const where = "dataset.Standardizer"
	if len(z.Mean) == 0 || len(z.Mean) != len(z.Std) {
		return argError(where, "Mean, Std", "lengths %d and %d, want equal and non-zero", len(z.Mean), len(z.Std))
	}
	for j := range z.Mean {
		if math.IsNaN(z.Mean[j]) || math.IsInf(z.Mean[j], 0) {
			return argError(where, "Mean", "feature %d: %v is not finite", j, z.Mean[j])
		}
		if !(z.Std[j] > 0) || math.IsInf(z.Std[j], 0) {
			return argError(where, "Std", "feature %d: %v, want finite and positive", j, z.Std[j])
		}
	}
	return nil
}

// Apply returns a copy of s with every feature standardised.
func (z Standardizer) Apply(s *Set) (*Set, error) {
	return z.mapSet("dataset.Standardizer.Apply", s, false)
}

// Invert returns a copy of s with the standardisation undone:
// x = y*Std[j] + Mean[j].
func (z Standardizer) Invert(s *Set) (*Set, error) {
	return z.mapSet("dataset.Standardizer.Invert", s, true)
}

func (z Standardizer) mapSet(where string, s *Set, inverse bool) (*Set, error) {
	if s == nil {
		return nil, argError(where, "s", "nil Set")
	}
	if err := z.Validate(); err != nil {
		return nil, err
	}
	if s.f != len(z.Mean) {
		return nil, argError(where, "s", "%d features, standardizer has %d", s.f, len(z.Mean))
	}
	c := s.clone()
	c.x = make([]float64, len(s.x))
	copy(c.x, s.x)
	z.apply64(c.x, inverse)
	if err := checkFiniteOrMissing(where, c.x, s.f, s.missing > 0); err != nil {
		return nil, err
	}
	return c, nil
}

// ApplySlice standardises, in place, row-major records held in x (a
// []float32 or []float64 whose length is a multiple of the feature count),
// for example a request's batch when serving.
func (z Standardizer) ApplySlice(x any) error {
	return z.mapSlice("dataset.Standardizer.ApplySlice", x, false)
}

// InvertSlice undoes the standardisation, in place, on row-major records in
// x (a []float32 or []float64), for example a decoder's reconstruction.
func (z Standardizer) InvertSlice(x any) error {
	return z.mapSlice("dataset.Standardizer.InvertSlice", x, true)
}

func (z Standardizer) mapSlice(where string, x any, inverse bool) error {
	if err := z.Validate(); err != nil {
		return err
	}
	f := len(z.Mean)
	switch v := x.(type) {
	case []float64:
		if len(v)%f != 0 {
			return argError(where, "x", "length %d is not a multiple of %d features", len(v), f)
		}
		z.apply64(v, inverse)
	case []float32:
		if len(v)%f != 0 {
			return argError(where, "x", "length %d is not a multiple of %d features", len(v), f)
		}
		for k := range v {
			j := k % f
			if inverse {
				v[k] = float32(float64(v[k])*z.Std[j] + z.Mean[j])
			} else {
				v[k] = float32((float64(v[k]) - z.Mean[j]) / z.Std[j])
			}
		}
	default:
		return argError(where, "x", "type %T, want []float32 or []float64", x)
	}
	return nil
}

func (z Standardizer) apply64(x []float64, inverse bool) {
	f := len(z.Mean)
	for k := range x {
		j := k % f
		if inverse {
			x[k] = x[k]*z.Std[j] + z.Mean[j]
		} else {
			x[k] = (x[k] - z.Mean[j]) / z.Std[j]
		}
	}
}
