package pipeline

import (
	"context"
	"fmt"
	"math"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/io/textio"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/x/beamx"

	"lowerbound.dev/examples/beam/tabular"
)

// Config configures the scoring pipeline.
type Config struct {
	Input    string // glob of CSV files
	Model    string // checkpoint path (any Beam filesystem)
	Out      string // output folder (any Beam filesystem); shards go under it
	Prefix   string // checkpoint metadata prefix; "" means tabular.DefaultPrefix
	IDColumn string // optional id column keying the records (see tabular)
	Score    tabular.ScoreConfig
	// Threshold overrides the checkpoint's alarm threshold; NaN keeps it.
	Threshold float64
	Embed     bool
	Batch     int // records per Score call; 0 means 1024
	Shards    int // output shards; 0 means 4
}

// OutPath joins an output folder and a name with "/" (filepath.Join would
// turn gs://b into gs:/b).
func OutPath(dir, name string) string { return strings.TrimSuffix(dir, "/") + "/" + name }

// BuildScore builds the scoring pipeline. It loads the checkpoint once at
// construction, to learn the column names and to fail early on a bad file.
func BuildScore(ctx context.Context, cfg Config) (*beam.Pipeline, tabular.Meta, error) {
	if cfg.Input == "" || cfg.Model == "" || cfg.Out == "" {
		return nil, tabular.Meta{}, fmt.Errorf("pipeline.BuildScore: Input %q, Model %q, Out %q: all three are needed", cfg.Input, cfg.Model, cfg.Out)
	}
	if cfg.Prefix == "" {
		cfg.Prefix = tabular.DefaultPrefix
	}
	if cfg.Shards <= 0 {
		cfg.Shards = 4
	}
	sc, err := LoadScorer(ctx, cfg.Model, cfg.Prefix)
	if err != nil {
		return nil, tabular.Meta{}, err
	}
	meta := sc.Meta()
	p, s := beam.NewPipelineWithRoot()
	records, dead := ReadRecords(s, cfg.Input, tabular.ParserConfig{Features: meta.Features, IDColumn: cfg.IDColumn})
	out := ScoreRecords(s, ScoreConfig{Model: cfg.Model, Prefix: cfg.Prefix, Score: cfg.Score, Threshold: cfg.Threshold,
		Embed: cfg.Embed, Batch: cfg.Batch, Shards: cfg.Shards}, records)
	WriteShards(s.Scope("scores"), OutPath(cfg.Out, "scores"), ScoresHeader, cfg.Shards, out.Scores)
	if cfg.Embed {
		WriteShards(s.Scope("embeddings"), OutPath(cfg.Out, "embeddings"), EmbeddingsHeader(sc.Model().Latent()), cfg.Shards, out.Embeddings)
	}
	WriteDeadLetters(s, OutPath(cfg.Out, "dead_letters"), cfg.Shards, beam.Flatten(s, dead, out.Dead))
	if math.IsNaN(cfg.Threshold) {
		cfg.Threshold = meta.Threshold
	}
	meta.Threshold = cfg.Threshold
	return p, meta, nil
}

// SampleConfig configures the sampling pipeline.
type SampleConfig struct {
	Input    string   // glob of CSV files
	Features []string // columns to read
	IDColumn string
	K        int    // sample size
	Seed     uint64 // the same input and seed give the same sample
	Out      string // the sample's CSV file
	Dead     string // dead-letter shard prefix
}

// BuildSample builds the pipeline that writes a uniform sample of K
// records to cfg.Out (one CSV file, columns key, file, line, id and the
// features) and the unreadable lines to dead-letter shards.
func BuildSample(cfg SampleConfig) (*beam.Pipeline, error) {
	if cfg.Input == "" || cfg.Out == "" || cfg.Dead == "" || len(cfg.Features) == 0 || cfg.K < 1 {
		return nil, fmt.Errorf("pipeline.BuildSample: Input %q, Out %q, Dead %q, %d features, K %d: want all set, K >= 1", cfg.Input, cfg.Out, cfg.Dead, len(cfg.Features), cfg.K)
	}
	p, s := beam.NewPipelineWithRoot()
	records, dead := ReadRecords(s, cfg.Input, tabular.ParserConfig{Features: cfg.Features, IDColumn: cfg.IDColumn})
	textio.Write(s, cfg.Out, FormatSample(s, Sample(s, records, cfg.K, cfg.Seed), cfg.Features))
	WriteDeadLetters(s, cfg.Dead, 1, dead)
	return p, nil
}

// Run runs p on the runner named by the --runner flag (prism when unset)
// and returns the "lowerbound" counters, summed over steps.
func Run(ctx context.Context, p *beam.Pipeline) (map[string]int64, error) {
	res, err := beamx.RunWithMetrics(ctx, p)
	if err != nil {
		return nil, err
	}
	out := map[string]int64{}
	if res == nil {
		return out, nil
	}
	for _, c := range res.Metrics().AllMetrics().Counters() {
		if c.Namespace() == Namespace {
			out[c.Name()] += c.Result()
		}
	}
	return out, nil
}
