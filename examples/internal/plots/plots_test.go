package plots

import (
	"image/png"
	"math"
	"os"
	"path/filepath"
	"testing"
)

func decodePNG(t *testing.T, path string) {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	c, err := png.DecodeConfig(f)
	if err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	if c.Width < 100 || c.Height < 100 {
		t.Errorf("%s: %dx%d", path, c.Width, c.Height)
	}
}

func TestHistogramsAndCurves(t *testing.T) {
	dir := t.TempDir()
	groups := []Group{{Name: "a", Values: []float64{-3, -1, 0, 2, 2, 5}}, {Name: "b", Values: []float64{10, 300, 4000}}}
	for _, signed := range []bool{false, true} {
		p := filepath.Join(dir, "h.png")
		if err := Histograms(p, groups, HistogramOptions{Title: "t", XLabel: "x", SignedLog: signed, Markers: []Marker{{Name: "m", X: 1}}}); err != nil {
			t.Fatal(err)
		}
		decodePNG(t, p)
	}
	p := filepath.Join(dir, "c.png")
	if err := Curves(p, []Curve{{Name: "c", X: []float64{0, 0.2, 1}, Y: []float64{0, 0.7, 1}}}, CurveOptions{Diagonal: true, DiagonalName: "chance", Unit: true,
		Points: []Point{{Name: "at the threshold", X: 0.01, Y: 0.7}, {X: 0.5, Y: 0.9, Shape: 2}}}); err != nil {
		t.Fatal(err)
	}
	decodePNG(t, p)

	if err := Histograms(p, nil, HistogramOptions{}); err == nil {
		t.Error("no groups: want an error")
	}
	if err := Histograms(p, []Group{{Name: "empty"}}, HistogramOptions{}); err == nil {
		t.Error("no values: want an error")
	}
	if err := Curves(p, []Curve{{Name: "bad", X: []float64{0, 1}, Y: []float64{0}}}, CurveOptions{}); err == nil {
		t.Error("mismatched curve: want an error")
	}
}

func TestSignedLog(t *testing.T) {
	// Closed form: sign(x) log10(1 + |x|) is 2 at 99, -3 at -999, 0 at 0.
	for _, c := range []struct{ x, want float64 }{{99, 2}, {-999, -3}, {0, 0}, {9, 1}} {
		if got := signedLog(c.x); math.Abs(got-c.want) > 1e-12 {
			t.Errorf("signedLog(%v) = %v, want %v", c.x, got, c.want)
		}
		if back := signedExp(c.want); math.Abs(back-c.x) > 1e-9*math.Max(1, math.Abs(c.x)) {
			t.Errorf("signedExp(%v) = %v, want %v", c.want, back, c.x)
		}
	}
	// Ticks: 0 and the powers of ten in range are labelled.
	labelled := map[string]bool{}
	for _, tk := range signedLogTicks(-20, 150) {
		if tk.Label != "" {
			labelled[tk.Label] = true
		}
		if tk.Value < -20 || tk.Value > 150 {
			t.Errorf("tick %v outside the range", tk.Value)
		}
	}
	for _, want := range []string{"-10", "-1", "0", "1", "10", "100"} {
		if !labelled[want] {
			t.Errorf("no labelled tick %s in %v", want, labelled)
		}
	}
}
