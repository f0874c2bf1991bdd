package alarm_test

import (
	"context"
	"errors"
	"fmt"
	"log"
	"os"
	"path/filepath"

	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// Calibrate a threshold for a 5% false-alarm rate on 200 held-out normal
// scores (here simply 1, 2, ..., 200), then judge new scores.
func Example() {
	cal := make([]float64, 200)
	for i := range cal {
		cal[i] = float64(i + 1)
	}
	c, err := alarm.Calibrate(cal, 0.05)
	if err != nil {
		log.Fatal(err)
	}
	// k = ceil(201 * 0.95) = 191: the 191st smallest score.
	fmt.Printf("threshold %v (rank %d of %d)\n", c.Threshold(), c.Rank(), c.N())
	lo, hi := c.Guarantee()
	fmt.Printf("P(a normal record alarms) in [%.4f, %.2f]\n", lo, hi)

	scores := []float64{100, 192, 250}
	flags, err := c.Flags(scores)
	if err != nil {
		log.Fatal(err)
	}
	p, err := c.PValues(scores)
	if err != nil {
		log.Fatal(err)
	}
	for i, s := range scores {
		fmt.Printf("score %v: alarm %v, p-value %.4f\n", s, flags[i], p[i])
	}

	// Too few calibration scores for a 1% rate:
	_, err = alarm.Calibrate(cal[:50], 0.01)
	fmt.Println(errors.Is(err, alarm.ErrTooFew), err)
	// Output:
	// threshold 191 (rank 191 of 200)
	// P(a normal record alarms) in [0.0450, 0.05]
	// score 100: alarm false, p-value 0.5075
	// score 192: alarm true, p-value 0.0498
	// score 250: alarm true, p-value 0.0050
	// true alarm.Calibrate: scores: 50 calibration scores cannot give a false-alarm rate of 0.01: at least 99 are needed: too few calibration scores (invalid argument)
}

// Screen a batch of ten records with a 10% false discovery rate: the
// conformal p-values of the batch go through Benjamini-Hochberg.
func ExampleCalibration_Screen() {
	cal := make([]float64, 999)
	for i := range cal {
		cal[i] = float64(i%100) / 10 // normal scores between 0 and 9.9
	}
	c, err := alarm.Calibrate(cal, 0.01)
	if err != nil {
		log.Fatal(err)
	}
	batch := []float64{3.2, 55, 9.95, 1.1, 40, 7.7, 0.4, 12, 5.5, 2.2}
	s, err := c.Screen(batch, 0.1)
	if err != nil {
		log.Fatal(err)
	}
	for i, f := range s.Flagged {
		if f {
			fmt.Printf("record %d: score %v, p-value %.4f\n", i, batch[i], s.PValues[i])
		}
	}
	fmt.Printf("%d flagged; p-value cutoff %.2f\n", s.Count, s.Cutoff)
	// Output:
	// record 1: score 55, p-value 0.0010
	// record 2: score 9.95, p-value 0.0010
	// record 4: score 40, p-value 0.0010
	// record 7: score 12, p-value 0.0010
	// 4 flagged; p-value cutoff 0.04
}

// Check a recent window against the calibration: here the recent scores
// run 20% higher than the calibration scores. By hand: the threshold is the
// ceil(1001 * 0.99) = 991st smallest score, 9.90; the recent scores 0.024 i
// exceed it for i = 413..499, 87 of them; the largest gap between the two
// distribution functions is near 9.99, 1 - 417/500 = 0.166.
func ExampleCalibration_Drift() {
	cal := make([]float64, 1000)
	recent := make([]float64, 500)
	for i := range cal {
		cal[i] = float64(i) / 100 // 0 .. 9.99
	}
	for i := range recent {
		recent[i] = 1.2 * float64(2*i) / 100
	}
	c, err := alarm.Calibrate(cal, 0.01)
	if err != nil {
		log.Fatal(err)
	}
	d, err := c.Drift(recent, 0.95)
	if err != nil {
		log.Fatal(err)
	}
	fmt.Printf("KS %.3f (p %.1g); false alarms %d of %d = %.3f, 95%% interval [%.3f, %.3f] against alpha %v\n",
		d.KS, d.KSPValue, d.Alarms, d.Window, d.Rate, d.RateLow, d.RateHigh, d.Alpha)
	fmt.Println("recalibrate:", d.RateAboveAlpha())
	// Output:
	// KS 0.167 (p 1e-08); false alarms 87 of 500 = 0.174, 95% interval [0.142, 0.210] against alpha 0.01
	// recalibrate: true
}

// Keep the calibration with the model: Put before Save, Get after Load.
func ExamplePut() {
	m, err := vae.NewMLP(vae.MLPConfig{Input: 4, Hidden: []int{8}, Latent: 2, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	normal, err := dataset.FromRows([][]float64{
		{0, 1, 0, 1}, {1, 0, 1, 0}, {0, 0, 1, 1}, {1, 1, 0, 0}, {0, 1, 1, 0},
		{1, 0, 0, 1}, {0, 0, 0, 1}, {1, 0, 0, 0}, {0, 1, 0, 0}, {0, 0, 1, 0},
	})
	if err != nil {
		log.Fatal(err)
	}
	scores, err := m.Score(context.Background(), normal, vae.ScoreOptions{K: 4, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	c, err := alarm.Calibrate(scores, 0.1) // 10 scores are enough for 10%
	if err != nil {
		log.Fatal(err)
	}
	if err := alarm.Put(m, c); err != nil {
		log.Fatal(err)
	}
	dir, err := os.MkdirTemp("", "alarm-example-")
	if err != nil {
		log.Fatal(err)
	}
	defer os.RemoveAll(dir)
	path := filepath.Join(dir, "model.safetensors")
	if err := m.Save(path); err != nil {
		log.Fatal(err)
	}

	loaded, err := vae.Load(path)
	if err != nil {
		log.Fatal(err)
	}
	back, err := alarm.Get(loaded)
	if err != nil {
		log.Fatal(err)
	}
	fmt.Println("same threshold:", back.Threshold() == c.Threshold())
	fmt.Println("alpha:", back.Alpha(), "n:", back.N())
	// Output:
	// same threshold: true
	// alpha: 0.1 n: 10
}
