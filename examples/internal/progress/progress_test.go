package progress

import (
	"bytes"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"lowerbound.dev/vae"
)

func TestSteps(t *testing.T) {
	// By hand: 250 records in batches of 100 are 3 steps (100, 100, 50).
	for _, c := range []struct{ n, batch, want int }{{250, 100, 3}, {200, 100, 2}, {1, 100, 1}, {0, 100, 0}, {5, 0, 0}} {
		if got := Steps(c.n, c.batch); got != c.want {
			t.Errorf("Steps(%d, %d) = %d, want %d", c.n, c.batch, got, c.want)
		}
	}
}

func TestPlainLines(t *testing.T) {
	var out bytes.Buffer
	if IsTerminal(&out) {
		t.Fatal("a buffer is not a terminal")
	}
	r := New(Options{Out: &out, Label: "fit", Epochs: 2, StepsPerEpoch: 3})
	for e := 1; e <= 2; e++ {
		for s := range 3 {
			r.OnStep(vae.StepInfo{Epoch: e, Step: (e-1)*3 + s, Loss: 1})
		}
		if err := r.OnEpoch(vae.EpochInfo{Epoch: e, Loss: 2.5, Validation: 3.25, Best: e == 1, Duration: time.Second}); err != nil {
			t.Fatal(err)
		}
	}
	if r.Done() < 0 {
		t.Error("negative duration")
	}
	lines := strings.Split(strings.TrimSpace(out.String()), "\n")
	if len(lines) != 2 {
		t.Fatalf("want one line per epoch (steps print nothing), have %q", out.String())
	}
	for i, l := range lines {
		if !strings.HasPrefix(l, fmt.Sprintf("fit epoch %d/2: loss 2.5000", i+1)) || !strings.Contains(l, "validation 3.2500") {
			t.Errorf("line %d: %q", i+1, l)
		}
	}
	if !strings.Contains(lines[0], "*") || strings.Contains(lines[1], "*") {
		t.Errorf("only the best epoch should be starred: %q", lines)
	}
}

func ExampleLine() {
	e := vae.EpochInfo{Epoch: 3, Loss: 4.5, Reconstruction: 3, KL: 1.5, Validation: math.NaN(),
		Duration: 2 * time.Second, SamplesPerSec: 5000}
	fmt.Println(Line("train", 10, e))
	// Output:
	// train epoch 3/10: loss 4.5000 (reconstruction 3.0000, KL 1.5000), 2.0s, 5000 records/s
}
