// Command gemmbench prints the speed, in GFLOP/s (2·M·N·K per product), of
// the SDK's matrix-product engine (internal/gemm) on the products of the
// MNIST benchmark models at batch 100, to compare with
// ../shared/bench/torch-gemm in the same run:
//
//	../shared/bench/torch-gemm 1 && go run ./internal/cmd/gemmbench
//
// With no arguments it measures torch-gemm's default shapes (M×K×N,
// C = A·B, float32, row-major), then every product of one training step of
// the 784-200-200-50 and 784-400-20 MLP VAEs: the forward X·W and the two
// backward products Xᵀ·dY (the weight gradient) and dY·Wᵀ (the input
// gradient). Arguments MxKxN replace the first list. Each figure is the best
// of -rounds timed rounds (as torch-gemm does), each of at least 2e9
// flops or 10 products; "cpu" divides by the process's CPU time instead of
// wall time, which on a busy machine shows what the kernel does when it
// runs.
package main

import (
	"flag"
	"fmt"
	"math/rand/v2"
	"os"
	"runtime"
	"strconv"
	"strings"
	"time"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/gonum"

	"lowerbound.dev/internal/gemm"
)

// product is one C = op(A)·op(B) with op(A) M×K and op(B) K×N.
type product struct {
	label   string
	m, k, n int
	tA, tB  bool
}

// torchShapes are ../shared/bench/torch-gemm's default shapes.
var torchShapes = []string{"100x784x200", "100x200x200", "100x200x100", "100x784x400", "100x400x784", "784x100x200", "200x100x784"}

// stepProducts lists the products of one training step of an MLP VAE with
// the given widths (input, hidden..., latent) at batch size batch: each
// dense layer in→out runs X·W (batch×in times in×out), Xᵀ·dY (the weight
// gradient, in×out) and dY·Wᵀ (the input gradient, batch×in). The encoder's
// last layer is the Gaussian head (two outputs of the latent width, counted
// as one product of twice the width); the decoder mirrors the encoder.
func stepProducts(name string, widths []int, batch int) []product {
	var layers [][2]int
	for i := 0; i+2 < len(widths); i++ {
		layers = append(layers, [2]int{widths[i], widths[i+1]})
	}
	last := widths[len(widths)-2]
	layers = append(layers, [2]int{last, 2 * widths[len(widths)-1]})
	for i := len(widths) - 1; i > 0; i-- {
		layers = append(layers, [2]int{widths[i], widths[i-1]})
	}
	var ps []product
	for _, l := range layers {
		in, out := l[0], l[1]
		tag := fmt.Sprintf("%s %d->%d", name, in, out)
		ps = append(ps,
			product{tag + " X·W", batch, in, out, false, false},
			product{tag + " Xᵀ·dY", in, batch, out, true, false},
			product{tag + " dY·Wᵀ", batch, out, in, false, true},
		)
	}
	return ps
}

func parseShape(s string) (product, error) {
	f := strings.Split(s, "x")
	if len(f) != 3 {
		return product{}, fmt.Errorf("shape %q: want MxKxN", s)
	}
	var d [3]int
	for i, v := range f {
		n, err := strconv.Atoi(v)
		if err != nil || n < 1 {
			return product{}, fmt.Errorf("shape %q: %q is not a positive integer", s, v)
		}
		d[i] = n
	}
	return product{label: "A·B", m: d[0], k: d[1], n: d[2]}, nil
}

func main() {
	threadList := flag.String("threads", "1,2", "goroutine counts to measure, comma-separated")
	rounds := flag.Int("rounds", 5, "timed rounds per figure (the best is printed)")
	portable := flag.Bool("portable", false, "use the engine's portable Go kernels")
	withGonum := flag.Bool("gonum", false, "also measure gonum's pure Go Sgemm (GOMAXPROCS goroutines)")
	flag.Parse()
	if err := run(*threadList, *rounds, *portable, *withGonum, flag.Args()); err != nil {
		fmt.Fprintln(os.Stderr, "gemmbench:", err)
		os.Exit(1)
	}
}

func run(threadList string, rounds int, portable, withGonum bool, args []string) error {
	if rounds < 1 {
		return fmt.Errorf("-rounds %d: want >= 1", rounds)
	}
	var threads []int
	for _, f := range strings.Split(threadList, ",") {
		t, err := strconv.Atoi(f)
		if err != nil || t < 1 {
			return fmt.Errorf("-threads %q: %q is not a positive integer", threadList, f)
		}
		threads = append(threads, t)
	}
	shapes := args
	if len(shapes) == 0 {
		shapes = torchShapes
	}
	var first []product
	for _, s := range shapes {
		p, err := parseShape(s)
		if err != nil {
			return err
		}
		first = append(first, p)
	}
	engines := make([]*gemm.Engine, len(threads))
	for i, t := range threads {
		opts := []gemm.Option{gemm.WithThreads(t)}
		if portable {
			opts = append(opts, gemm.WithPortable())
		}
		e, err := gemm.New(opts...)
		if err != nil {
			return err
		}
		engines[i] = e
	}
	if m := slicesMax(threads); runtime.GOMAXPROCS(0) < m {
		runtime.GOMAXPROCS(m)
	}
	k32, _ := engines[0].Kernels()
	fmt.Printf("lowerbound gemmbench: float32, kernel %s, GOMAXPROCS %d, best of %d rounds, GFLOP/s (wall / cpu)\n", k32, runtime.GOMAXPROCS(0), rounds)
	header := func(title string) {
		fmt.Printf("\n%s\n%-32s %5s %5s %5s", title, "product", "M", "K", "N")
		for _, t := range threads {
			fmt.Printf("  %15s", fmt.Sprintf("%d thread(s)", t))
		}
		if withGonum {
			fmt.Printf("  %9s", "gonum")
		}
		fmt.Println()
	}
	line := func(p product) {
		fmt.Printf("%-32s %5d %5d %5d", p.label, p.m, p.k, p.n)
		for _, e := range engines {
			wall, cpu := measure(p, rounds, e.Sgemm)
			fmt.Printf("  %7.1f / %5.1f", wall, cpu)
		}
		if withGonum {
			wall, _ := measure(p, rounds, gonumSgemm)
			fmt.Printf("  %9.1f", wall)
		}
		fmt.Println()
	}
	header("torch-gemm shapes (C = A·B)")
	for _, p := range first {
		line(p)
	}
	if len(args) == 0 {
		header("one training step, batch 100")
		for _, p := range stepProducts("784-200-200-50", []int{784, 200, 200, 50}, 100) {
			line(p)
		}
		for _, p := range stepProducts("784-400-20", []int{784, 400, 20}, 100) {
			line(p)
		}
	}
	return nil
}

func slicesMax(s []int) int {
	m := 0
	for _, v := range s {
		m = max(m, v)
	}
	return m
}

type sgemmFunc func(tA, tB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int)

func gonumSgemm(tA, tB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	t := func(x bool) blas.Transpose {
		if x {
			return blas.Trans
		}
		return blas.NoTrans
	}
	gonum.Implementation{}.Sgemm(t(tA), t(tB), m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// measure returns the best wall-clock and CPU-time GFLOP/s over rounds.
func measure(p product, rounds int, f sgemmFunc) (wall, cpu float64) {
	rng := rand.New(rand.NewPCG(1, 2))
	fill := func(n int) []float32 {
		s := make([]float32, n)
		for i := range s {
			s[i] = float32(rng.NormFloat64())
		}
		return s
	}
	a, b, c := fill(p.m*p.k), fill(p.k*p.n), make([]float32, p.m*p.n)
	lda, ldb := p.k, p.n
	if p.tA {
		lda = p.m
	}
	if p.tB {
		ldb = p.k
	}
	flops := 2 * float64(p.m) * float64(p.n) * float64(p.k)
	reps := max(10, int(2e9/flops))
	for range max(3, reps/10) { // warm up
		f(p.tA, p.tB, p.m, p.n, p.k, 1, a, lda, b, ldb, 0, c, p.n)
	}
	for range rounds {
		c0, t0 := cpuTime(), time.Now()
		for range reps {
			f(p.tA, p.tB, p.m, p.n, p.k, 1, a, lda, b, ldb, 0, c, p.n)
		}
		w, u := time.Since(t0).Seconds(), (cpuTime() - c0).Seconds()
		wall = max(wall, flops*float64(reps)/w/1e9)
		if u > 0 {
			cpu = max(cpu, flops*float64(reps)/u/1e9)
		}
	}
	return wall, cpu
}
