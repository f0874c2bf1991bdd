package progress

import (
	"fmt"
	"io"
	"math"
	"os"
	"time"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"

	"lowerbound.dev/vae"
)

// Options configures a Reporter.
type Options struct {
	// Out receives the bar or the log lines; nil means os.Stderr.
	Out io.Writer
	// Label prefixes every line; empty means "train".
	Label string
	// Epochs and StepsPerEpoch size the bar (Epochs*StepsPerEpoch steps).
	Epochs, StepsPerEpoch int
	// Plain forces log lines even on a terminal.
	Plain bool
}

// Reporter turns the trainer's callbacks into a bar or log lines. Use one
// Reporter per Train call; it is not safe for concurrent use (the trainer
// calls it from one goroutine).
type Reporter struct {
	out    io.Writer
	label  string
	epochs int
	bar    *progressbar.ProgressBar
	start  time.Time
}

// Steps returns the optimiser steps in one epoch of n records in batches
// of size batch (the last batch may be smaller).
func Steps(n, batch int) int {
	if batch < 1 {
		return 0
	}
	return (n + batch - 1) / batch
}

// IsTerminal reports whether w is an *os.File attached to a terminal.
func IsTerminal(w io.Writer) bool {
	f, ok := w.(*os.File)
	return ok && term.IsTerminal(int(f.Fd()))
}

// New returns a Reporter. It draws a bar when Out is a terminal (and Plain
// is false) and writes one line per epoch otherwise.
func New(opt Options) *Reporter {
	r := &Reporter{out: opt.Out, label: opt.Label, epochs: opt.Epochs, start: time.Now()}
	if r.out == nil {
		r.out = os.Stderr
	}
	if r.label == "" {
		r.label = "train"
	}
	if !opt.Plain && IsTerminal(r.out) && opt.Epochs > 0 && opt.StepsPerEpoch > 0 {
		r.bar = progressbar.NewOptions(opt.Epochs*opt.StepsPerEpoch,
			progressbar.OptionSetWriter(r.out),
			progressbar.OptionSetDescription(r.label),
			progressbar.OptionSetWidth(30),
			progressbar.OptionShowCount(),
			progressbar.OptionSetPredictTime(true),
			progressbar.OptionThrottle(100*time.Millisecond),
			progressbar.OptionOnCompletion(func() { fmt.Fprintln(r.out) }),
		)
	}
	return r
}

// OnStep is a vae.TrainConfig.OnStep callback: it advances the bar and
// shows the running loss.
func (r *Reporter) OnStep(s vae.StepInfo) {
	if r.bar == nil {
		return
	}
	r.bar.Describe(fmt.Sprintf("%s epoch %d/%d loss %8.3f", r.label, s.Epoch, r.epochs, s.Loss))
	_ = r.bar.Add(1)
}

// OnEpoch is a vae.TrainConfig.OnEpoch callback: it writes the epoch's
// summary line (above the bar on a terminal). It never stops training.
func (r *Reporter) OnEpoch(e vae.EpochInfo) error {
	line := Line(r.label, r.epochs, e)
	if r.bar != nil {
		_, _ = progressbar.Bprintln(r.bar, line)
		return nil
	}
	_, _ = fmt.Fprintln(r.out, line)
	return nil
}

// Done completes the bar (training may stop before the last epoch when
// patience runs out) and returns the time since New.
func (r *Reporter) Done() time.Duration {
	if r.bar != nil && !r.bar.IsFinished() {
		_ = r.bar.Finish()
	}
	return time.Since(r.start)
}

// Line formats one epoch's summary.
func Line(label string, epochs int, e vae.EpochInfo) string {
	s := fmt.Sprintf("%s epoch %d/%d: loss %.4f (reconstruction %.4f, KL %.4f)", label, e.Epoch, epochs, e.Loss, e.Reconstruction, e.KL)
	if !math.IsNaN(e.Validation) {
		s += fmt.Sprintf(", validation %.4f", e.Validation)
		if e.Best {
			s += " *"
		}
	}
	return s + fmt.Sprintf(", %.1fs, %.0f records/s", e.Duration.Seconds(), e.SamplesPerSec)
}
