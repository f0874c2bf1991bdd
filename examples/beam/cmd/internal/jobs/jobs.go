// Package jobs runs the example's pipelines end to end for its commands:
// sampled training (Train), scoring (Score) and the demo data (Demo).
package jobs

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"time"

	"lowerbound.dev/examples/beam/pipeline"
	"lowerbound.dev/examples/beam/tabular"
)

// TrainJob is what Train needs.
type TrainJob struct {
	Input    string
	Columns  []string
	IDColumn string
	Sample   int
	Seed     uint64
	Model    string // checkpoint to write (local)
	Work     string // folder of the sample file and the dead letters
	Train    tabular.TrainConfig
}

// Train runs the sampling pipeline and trains on its sample.
func Train(ctx context.Context, j TrainJob, log io.Writer) error {
	if err := os.MkdirAll(j.Work, 0o755); err != nil {
		return err
	}
	if dir := filepath.Dir(j.Model); dir != "" {
		if err := os.MkdirAll(dir, 0o755); err != nil {
			return err
		}
	}
	samplePath := filepath.Join(j.Work, "sample.csv")
	p, err := pipeline.BuildSample(pipeline.SampleConfig{Input: j.Input, Features: j.Columns, IDColumn: j.IDColumn, K: j.Sample, Seed: j.Seed,
		Out: samplePath, Dead: filepath.Join(j.Work, "dead_letters")})
	if err != nil {
		return err
	}
	t0 := time.Now()
	counters, err := pipeline.Run(ctx, p)
	if err != nil {
		return fmt.Errorf("sampling pipeline: %w", err)
	}
	fmt.Fprintf(log, "sampled %d of %d records in %.1fs (seed %d) into %s\n", min(int64(j.Sample), counters[pipeline.CounterRecords]),
		counters[pipeline.CounterRecords], time.Since(t0).Seconds(), j.Seed, samplePath)
	printCounters(log, counters)
	t0 = time.Now()
	m, hist, err := tabular.TrainFromSample(ctx, samplePath, j.Train)
	if err != nil {
		return fmt.Errorf("training on %s: %w", samplePath, err)
	}
	meta, err := tabular.ReadMeta(m, tabular.DefaultPrefix)
	if err != nil {
		return err
	}
	last := hist[len(hist)-1]
	alpha := j.Train.Alpha
	if alpha == 0 {
		alpha = 0.01 // TrainModel's default
	}
	fmt.Fprintf(log, "trained %d epochs in %.1fs, last epoch loss %.3f; alarm threshold %.3f nats (split conformal, false-alarm rate %g, on records held out from training)\n",
		len(hist), time.Since(t0).Seconds(), last.Loss, meta.Threshold, alpha)
	if err := m.Save(j.Model); err != nil {
		return err
	}
	fmt.Fprintf(log, "wrote %s\n", j.Model)
	return nil
}

// Score runs the scoring pipeline and returns its counters.
func Score(ctx context.Context, cfg pipeline.Config, log io.Writer) (map[string]int64, error) {
	p, meta, err := pipeline.BuildScore(ctx, cfg)
	if err != nil {
		return nil, err
	}
	t0 := time.Now()
	counters, err := pipeline.Run(ctx, p)
	if err != nil {
		return nil, fmt.Errorf("scoring pipeline: %w", err)
	}
	secs := time.Since(t0).Seconds()
	fmt.Fprintf(log, "scored %d records in %.1fs (%.0f records/s, pipeline start to end), threshold %v, outputs in %s\n",
		counters[pipeline.CounterScored], secs, float64(counters[pipeline.CounterScored])/secs, meta.Threshold, cfg.Out)
	printCounters(log, counters)
	return counters, nil
}

func printCounters(log io.Writer, c map[string]int64) {
	names := make([]string, 0, len(c))
	for n := range c {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		fmt.Fprintf(log, "  %-28s %d\n", n, c[n])
	}
}

// Demo writes the invented demo data set into dir and returns its glob.
func Demo(dir string, records, files, malformed int, seed uint64, log io.Writer) (string, error) {
	paths, err := tabular.Generate(tabular.GenerateConfig{Dir: dir, Records: records, Files: files, AnomalyRate: 0.005, Malformed: malformed, Seed: seed})
	if err != nil {
		return "", err
	}
	fmt.Fprintf(log, "wrote %d invented demo records (%d malformed lines) in %d files under %s\n", records, malformed*len(paths), len(paths), dir)
	return filepath.Join(dir, "*.csv"), nil
}
