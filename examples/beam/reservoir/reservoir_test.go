package reservoir

import (
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

// The uniformity checks draw many samples of k out of N = 100 items, each
// with its own seed, and count how often every item is chosen. For a
// uniform sample without replacement every item is chosen with probability
// p = k/N, and the counts c_i over T samples have mean T*p and covariance
// T*p*(1-p)*N/(N-1)*(I - J/N) (the multivariate hypergeometric covariance
// of one sample, summed over independent samples; from memory, see Johnson,
// Kotz and Balakrishnan, Discrete Multivariate Distributions, 1997, ch. 39).
// So X = (N-1)/(N*(1-p)) * sum_i (c_i - T*p)^2 / (T*p) is asymptotically
// chi-square with N-1 degrees of freedom (for k = 1 the factor is 1 and X
// is Pearson's statistic). The test rejects at alpha = 0.001, the critical
// value from gonum's distuv.ChiSquared: with fixed seeds a correct sampler
// passes deterministically, and a wrong one (see TestChiSquareRejectsBias)
// fails by a wide margin.
const (
	population = 100
	alpha      = 0.001
)

func chiSquare(t *testing.T, counts []int, trials, k int) (x, critical float64) {
	t.Helper()
	n := float64(len(counts))
	p := float64(k) / n
	e := float64(trials) * p
	var sum float64
	for _, c := range counts {
		d := float64(c) - e
		sum += d * d / e
	}
	x = sum * (n - 1) / (n * (1 - p))
	critical = distuv.ChiSquared{K: n - 1}.Quantile(1 - alpha)
	return x, critical
}

func countBottomK(trials, k int, seed0 uint64) []int {
	counts := make([]int, population)
	for tr := range trials {
		b := NewBottomK[int](k, seed0+uint64(tr))
		for i := range population {
			b.Add(uint64(i), i)
		}
		for _, it := range b.Items() {
			counts[it.Value]++
		}
	}
	return counts
}

func TestBottomKUniform(t *testing.T) {
	for _, k := range []int{1, 10} {
		trials := 20000
		counts := countBottomK(trials, k, 1)
		total := 0
		for _, c := range counts {
			total += c
		}
		if total != trials*k {
			t.Fatalf("k=%d: %d items chosen in %d samples, want %d", k, total, trials, trials*k)
		}
		x, crit := chiSquare(t, counts, trials, k)
		t.Logf("bottom-k, k=%d: X = %.1f, critical value %.1f (df %d, alpha %g)", k, x, crit, population-1, alpha)
		if x > crit {
			t.Errorf("bottom-k, k=%d: chi-square %.1f above the critical value %.1f: not uniform", k, x, crit)
		}
	}
}

func TestAlgorithmRUniform(t *testing.T) {
	for _, k := range []int{1, 10} {
		trials := 20000
		counts := make([]int, population)
		for tr := range trials {
			r := NewAlgorithmR[int](k, uint64(tr)+1)
			for i := range population {
				r.Add(i)
			}
			s := r.Sample()
			if len(s) != k {
				t.Fatalf("k=%d: sample of %d", k, len(s))
			}
			for _, v := range s {
				counts[v]++
			}
		}
		x, crit := chiSquare(t, counts, trials, k)
		t.Logf("algorithm R, k=%d: X = %.1f, critical value %.1f", k, x, crit)
		if x > crit {
			t.Errorf("algorithm R, k=%d: chi-square %.1f above the critical value %.1f: not uniform", k, x, crit)
		}
	}
}

// TestChiSquareRejectsBias shows the check can fail: a sampler that keeps
// an item of the first ten with a slightly higher chance is rejected.
func TestChiSquareRejectsBias(t *testing.T) {
	const k, trials = 10, 20000
	counts := make([]int, population)
	for tr := range trials {
		b := NewBottomK[int](k, uint64(tr)+1)
		for i := range population {
			pr := Priority(b.Seed, uint64(i))
			if i < 10 {
				pr = pr / 10 * 9 // 10% smaller priorities for the first ten
			}
			b.AddItem(Item[int]{Priority: pr, Key: uint64(i), Value: i})
		}
		for _, it := range b.Items() {
			counts[it.Value]++
		}
	}
	x, crit := chiSquare(t, counts, trials, k)
	if x <= crit {
		t.Errorf("biased sampler: chi-square %.1f not above the critical value %.1f", x, crit)
	}
}

// TestBottomKMergeable: splitting the input into shards in any way and
// merging the shards' samples in any order gives the sample of one pass.
func TestBottomKMergeable(t *testing.T) {
	const n, k, seed = 5000, 37, 42
	whole := NewBottomK[int](k, seed)
	for i := range n {
		whole.Add(uint64(i)*7919+3, i)
	}
	want := whole.Items()
	rng := rand.New(rand.NewPCG(1, 2))
	for trial := range 20 {
		shards := make([]*BottomK[int], 1+rng.IntN(9))
		for s := range shards {
			shards[s] = NewBottomK[int](k, seed)
		}
		for _, i := range rng.Perm(n) {
			shards[rng.IntN(len(shards))].Add(uint64(i)*7919+3, i)
		}
		rng.Shuffle(len(shards), func(a, b int) { shards[a], shards[b] = shards[b], shards[a] })
		for len(shards) > 1 { // merge pairs in random order
			a := rng.IntN(len(shards) - 1)
			shards[a].Merge(shards[a+1])
			shards = append(shards[:a+1], shards[a+2:]...)
		}
		got := shards[0].Items()
		if len(got) != len(want) {
			t.Fatalf("trial %d: %d items, want %d", trial, len(got), len(want))
		}
		for i := range got {
			if got[i] != want[i] {
				t.Fatalf("trial %d: item %d is %+v, want %+v", trial, i, got[i], want[i])
			}
		}
	}
}

func TestSamplesRepeatable(t *testing.T) {
	a, b, c := countBottomK(50, 10, 9), countBottomK(50, 10, 9), countBottomK(50, 10, 10)
	same, diff := true, false
	for i := range a {
		same = same && a[i] == b[i]
		diff = diff || a[i] != c[i]
	}
	if !same {
		t.Error("bottom-k: the same seeds gave different samples")
	}
	if !diff {
		t.Error("bottom-k: other seeds gave the same samples")
	}
	r1, r2 := NewAlgorithmR[int](5, 3), NewAlgorithmR[int](5, 3)
	for i := range 1000 {
		r1.Add(i)
		r2.Add(i)
	}
	s1, s2 := r1.Sample(), r2.Sample()
	for i := range s1 {
		if s1[i] != s2[i] {
			t.Fatalf("algorithm R: the same seed gave %v and %v", s1, s2)
		}
	}
}
