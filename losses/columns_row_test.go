package losses_test

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/stat/distuv"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// LogProbRow and MeanRow, the plain-slice forms the lean inference path
// runs, against gonum stat/distuv (refColumn: Normal, LogNormal, Poisson,
// Bernoulli, Categorical) and distuv's means, with missing entries.
func TestColumnsRowMatchGonum(t *testing.T) {
	const n = 6
	c := len(mixedSchema)
	lik, x, out, lsParam, ls := rowCase(t, 120, n)
	lp, mean := make([]float64, c), make([]float64, c)
	for i := 0; i < n; i++ {
		row, xr := out[i*9:(i+1)*9], x[i*c:(i+1)*c]
		sum, err := lik.LogProbRow(xr, row, ls, lp)
		if err != nil {
			t.Fatal(err)
		}
		var want float64
		for j := 0; j < c; j++ {
			v := refColumn(j, xr[j], row, floorRef(lsParam[j]))
			want += v
			if !closeRel(lp[j], v, 1e-12) {
				t.Errorf("record %d column %d: LogProbRow %v, distuv %v", i, j, lp[j], v)
			}
			if math.IsNaN(xr[j]) && lp[j] != 0 {
				t.Errorf("record %d column %d: missing entry gives %v, want 0", i, j, lp[j])
			}
		}
		if !closeRel(sum, want, 1e-12) {
			t.Errorf("record %d: sum %v, distuv %v", i, sum, want)
		}
		if err := lik.MeanRow(row, ls, mean); err != nil {
			t.Fatal(err)
		}
		wantMean := []float64{row[0], row[1],
			distuv.LogNormal{Mu: row[2], Sigma: 0.8}.Mean(),
			distuv.LogNormal{Mu: row[3], Sigma: math.Exp(floorRef(lsParam[3]))}.Mean(),
			distuv.Poisson{Lambda: math.Exp(row[4])}.Mean(),
			distuv.Bernoulli{P: sigmoid(row[5])}.Mean()}
		for j, v := range wantMean {
			if !closeRel(mean[j], v, 1e-12) {
				t.Errorf("record %d column %d: MeanRow %v, distuv %v", i, j, mean[j], v)
			}
		}
		cat := categorical(row[6:9])
		mode := 0
		for k := 1; k < 3; k++ {
			if cat.Prob(float64(k)) > cat.Prob(float64(mode)) {
				mode = k
			}
		}
		if mean[6] != float64(mode) {
			t.Errorf("record %d: categorical mode %v, distuv %d", i, mean[6], mode)
		}
	}
	// Out of support: -Inf, as the graph op gives.
	bad := []float64{0, 0, -1, 1, 0.5, 0, 0}
	if _, err := lik.LogProbRow(bad, out[:9], ls, lp); err != nil || !math.IsInf(lp[2], -1) || !math.IsInf(lp[4], -1) {
		t.Errorf("out-of-support entries: lp %v, err %v; want -Inf for columns 2 and 4", lp, err)
	}
	// Wrong lengths are errors, not panics.
	if _, err := lik.LogProbRow(x[:c-1], out[:9], ls, lp); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("short x: err = %v", err)
	}
	if _, err := lik.LogProbRow(x[:c], out[:8], ls, lp); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("short out: err = %v", err)
	}
	if err := lik.MeanRow(out[:9], ls[:2], mean); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("short logSigmas: err = %v", err)
	}
	var zero losses.Columns
	if err := zero.MeanRow(out[:9], ls, mean); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("zero Columns: err = %v", err)
	}
}

func closeRel(a, b, tol float64) bool {
	if math.IsInf(a, 0) || math.IsInf(b, 0) {
		return a == b
	}
	return math.Abs(a-b) <= tol*math.Max(1, math.Max(math.Abs(a), math.Abs(b)))
}

// GradRow's derivatives against central finite differences (gonum
// diff/fd, step 1e-6) of the gonum stat/distuv log-densities (refColumn),
// with respect to every decoder output and to each learned column's log
// sigma, on records with missing entries; its log-probabilities equal
// LogProbRow's.
func TestColumnsGradRowMatchesFiniteDifferences(t *testing.T) {
	const n = 5
	c := len(mixedSchema)
	lik, x, out, _, ls := rowCase(t, 130, n)
	lp, lp2 := make([]float64, c), make([]float64, c)
	dOut, dLs := make([]float64, 9), make([]float64, c)
	for i := 0; i < n; i++ {
		row, xr := out[i*9:(i+1)*9], x[i*c:(i+1)*c]
		sum, err := lik.GradRow(xr, row, ls, lp, dOut, dLs)
		if err != nil {
			t.Fatal(err)
		}
		if want, _ := lik.LogProbRow(xr, row, ls, lp2); sum != want {
			t.Errorf("record %d: GradRow sum %v, LogProbRow %v", i, sum, want)
		}
		// The record's total log-density as a function of the outputs
		// and the two learned log sigmas (columns 1 and 3), by distuv.
		total := func(v []float64) float64 {
			var s float64
			for j := 0; j < c; j++ {
				logS := 0.0
				if j == 1 || j == 3 {
					logS = v[9+j/2] // v[9] column 1, v[10] column 3
				}
				s += refColumn(j, xr[j], v[:9], logS)
			}
			return s
		}
		at := append(append([]float64(nil), row...), ls[1], ls[3])
		num := fd.Gradient(nil, total, at, &fd.Settings{Formula: fd.Central, Step: 1e-6})
		for k := 0; k < 9; k++ {
			if !closeRel(dOut[k], num[k], 1e-6) {
				t.Errorf("record %d output %d: GradRow %v, finite difference %v", i, k, dOut[k], num[k])
			}
		}
		for _, j := range []int{1, 3} {
			if !closeRel(dLs[j], num[9+j/2], 1e-6) {
				t.Errorf("record %d column %d: d/dlog sigma %v, finite difference %v", i, j, dLs[j], num[9+j/2])
			}
		}
		for _, j := range []int{0, 2, 4, 5, 6} {
			if dLs[j] != 0 {
				t.Errorf("record %d column %d learns no sigma: d/dlog sigma %v, want 0", i, j, dLs[j])
			}
		}
	}
	if _, err := lik.GradRow(x[:c], out[:9], ls, lp, dOut[:8], dLs); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Errorf("short dOut: err = %v", err)
	}
}

// rowCase returns a float64 Columns over mixedSchema with random raw log
// sigmas, n records with missing entries and decoder outputs for them, the
// raw parameters and LogSigmas (the bounded learned values, log Sigma of
// fixed columns).
func rowCase(t *testing.T, seed uint64, n int) (lik *losses.Columns, x, out, lsParam, ls []float64) {
	t.Helper()
	x, out, lsParam = mixedData(rand.New(rand.NewPCG(seed, seed+1)), n, true)
	lik, err := losses.NewColumns("dec", mixedSchema, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	copy(lik.Params()[0].Value.Float64s(), lsParam)
	return lik, x, out, lsParam, lik.LogSigmas()
}
