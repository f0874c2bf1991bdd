package pipeline

import (
	"context"
	"fmt"
	"io"
	"math"
	"os"
	"reflect"
	"strconv"
	"strings"
	"sync"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/io/filesystem"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"

	"lowerbound.dev/examples/beam/tabular"
	"lowerbound.dev/vae"
)

func init() {
	register.DoFn5x1[context.Context, tabular.Record, func(int, string), func(int, string), func(tabular.DeadLetter), error](&scoreFn{})
	register.Emitter2[int, string]()
}

func typeOf[T any]() reflect.Type { return reflect.TypeOf((*T)(nil)).Elem() }

// ScoreConfig configures ScoreRecords.
type ScoreConfig struct {
	Model  string // checkpoint path, any Beam filesystem
	Prefix string // metadata prefix; "" means tabular.DefaultPrefix
	Score  tabular.ScoreConfig
	// Threshold flags records whose score exceeds it; NaN means the
	// checkpoint's threshold, and no flags when it has none.
	Threshold float64
	Embed     bool // also output encoder means
	Batch     int  // records per Score call; 0 means 1024
	Shards    int  // shard count of the outputs, used to key lines; 0 means 4
}

// ScoreOutputs are ScoreRecords's outputs: lines keyed by their shard.
type ScoreOutputs struct {
	Scores     beam.PCollection // KV<int, string>, ScoresHeader columns
	Embeddings beam.PCollection // KV<int, string>, EmbeddingsHeader columns; empty unless Embed
	Dead       beam.PCollection // tabular.DeadLetter
}

// ScoresHeader is the header of the score shards; flagged is empty when
// there is no threshold.
const ScoresHeader = "key,file,line,id,score,flagged"

// EmbeddingsHeader returns the header of the embedding shards for d latent
// dimensions.
func EmbeddingsHeader(d int) string {
	h := "key,file,line,id"
	for j := range d {
		h += ",mu" + strconv.Itoa(j)
	}
	return h
}

// ScoreRecords scores records (tabular.Record) with the checkpoint.
func ScoreRecords(s beam.Scope, cfg ScoreConfig, records beam.PCollection) ScoreOutputs {
	s = s.Scope("ScoreRecords")
	if cfg.Prefix == "" {
		cfg.Prefix = tabular.DefaultPrefix
	}
	if cfg.Batch <= 0 {
		cfg.Batch = 1024
	}
	if cfg.Shards <= 0 {
		cfg.Shards = 4
	}
	fn := &scoreFn{Model: cfg.Model, Prefix: cfg.Prefix, K: cfg.Score.K, Seed: cfg.Score.Seed, AtMean: cfg.Score.AtPosteriorMean,
		HasThreshold: !math.IsNaN(cfg.Threshold), Threshold: cfg.Threshold, Embed: cfg.Embed, Batch: cfg.Batch, Shards: cfg.Shards}
	if !fn.HasThreshold {
		fn.Threshold = 0 // NaN does not encode as JSON
	}
	scores, emb, dead := beam.ParDo3(s, fn, records)
	return ScoreOutputs{Scores: scores, Embeddings: emb, Dead: dead}
}

// scoreFn scores records in batches. Exported fields are its
// configuration (Beam serialises them); the rest is per instance.
type scoreFn struct {
	Model        string
	Prefix       string
	K            int
	Seed         uint64
	AtMean       bool
	HasThreshold bool
	Threshold    float64
	Embed        bool
	Batch        int
	Shards       int

	once      sync.Once
	scorer    *tabular.Scorer
	loadErr   error
	threshold float64 // NaN: no flags
	buf       []tabular.Record
	x         []float64
	keys      []uint64
}

// Setup loads the model once per DoFn instance.
func (f *scoreFn) Setup(ctx context.Context) error {
	f.once.Do(func() {
		f.scorer, f.loadErr = LoadScorer(ctx, f.Model, f.Prefix)
		if f.loadErr != nil {
			return
		}
		f.threshold = f.scorer.Meta().Threshold
		if f.HasThreshold {
			f.threshold = f.Threshold
		}
	})
	return f.loadErr
}

// StartBundle empties the buffer. (Beam wants the emitters of
// ProcessElement in its signature too.)
func (f *scoreFn) StartBundle(ctx context.Context, _, _ func(int, string), _ func(tabular.DeadLetter)) {
	f.buf, f.x, f.keys = f.buf[:0], f.x[:0], f.keys[:0]
}

func (f *scoreFn) ProcessElement(ctx context.Context, rec tabular.Record, emit, emitEmb func(int, string), emitDead func(tabular.DeadLetter)) error {
	var d *tabular.DeadLetter
	f.x, d = f.scorer.Standardize(f.x, rec)
	if d != nil {
		deadLetter(ctx, emitDead, *d)
		return nil
	}
	f.buf = append(f.buf, rec)
	f.keys = append(f.keys, rec.Key)
	if len(f.buf) >= f.Batch {
		return f.flush(ctx, emit, emitEmb)
	}
	return nil
}

func (f *scoreFn) FinishBundle(ctx context.Context, emit, emitEmb func(int, string), emitDead func(tabular.DeadLetter)) error {
	return f.flush(ctx, emit, emitEmb)
}

// flush scores the buffered records with one Score call (and one Encode
// call for embeddings) and emits their lines.
func (f *scoreFn) flush(ctx context.Context, emit, emitEmb func(int, string)) error {
	n := len(f.buf)
	if n == 0 {
		return nil
	}
	cfg := tabular.ScoreConfig{K: f.K, Seed: f.Seed, AtPosteriorMean: f.AtMean}
	scores, err := f.scorer.Score(ctx, f.x, f.keys, cfg)
	if err != nil {
		return fmt.Errorf("score %d records from %s line %d on: %w", n, f.buf[0].File, f.buf[0].Line, err)
	}
	flagged := 0
	for i, rec := range f.buf {
		flag := ""
		if !math.IsNaN(f.threshold) {
			flag = strconv.FormatBool(scores[i] > f.threshold)
			if scores[i] > f.threshold {
				flagged++
			}
		}
		emit(f.shard(rec.Key), recordPrefix(rec)+","+strconv.FormatFloat(scores[i], 'g', -1, 64)+","+flag)
	}
	if f.Embed {
		mu, err := f.scorer.Embed(ctx, f.x, n)
		if err != nil {
			return fmt.Errorf("embed %d records from %s line %d on: %w", n, f.buf[0].File, f.buf[0].Line, err)
		}
		_, d := mu.Dims()
		for i, rec := range f.buf {
			var b strings.Builder
			b.WriteString(recordPrefix(rec))
			for j := range d {
				b.WriteByte(',')
				b.WriteString(strconv.FormatFloat(mu.At(i, j), 'g', -1, 64))
			}
			emitEmb(f.shard(rec.Key), b.String())
		}
	}
	beam.NewCounter(Namespace, CounterScored).Inc(ctx, int64(n))
	beam.NewCounter(Namespace, CounterFlagged).Inc(ctx, int64(flagged))
	f.buf, f.x, f.keys = f.buf[:0], f.x[:0], f.keys[:0]
	return nil
}

func (f *scoreFn) shard(key uint64) int { return int(key % uint64(f.Shards)) }

// recordPrefix is the key, file, line and id columns of an output line.
func recordPrefix(r tabular.Record) string {
	return strconv.FormatUint(r.Key, 10) + "," + csvField(r.File) + "," + strconv.FormatInt(r.Line, 10) + "," + csvField(r.ID)
}

// csvField quotes s when CSV needs it.
func csvField(s string) string {
	if !strings.ContainsAny(s, ",\"\r\n") {
		return s
	}
	return `"` + strings.ReplaceAll(s, `"`, `""`) + `"`
}

// LoadScorer loads a checkpoint from any path a Beam filesystem can read:
// a local path directly, anything else (gs://...) through a temporary
// local copy.
func LoadScorer(ctx context.Context, path, prefix string) (*tabular.Scorer, error) {
	if !strings.Contains(path, "://") {
		return tabular.LoadScorer(path, prefix)
	}
	fs, err := filesystem.New(ctx, path)
	if err != nil {
		return nil, err
	}
	defer fs.Close()
	rc, err := fs.OpenRead(ctx, path)
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	tmp, err := os.CreateTemp("", "lowerbound-model-*.safetensors")
	if err != nil {
		return nil, err
	}
	defer os.Remove(tmp.Name())
	if _, err := io.Copy(tmp, rc); err != nil {
		tmp.Close()
		return nil, fmt.Errorf("copy %s: %w", path, err)
	}
	if err := tmp.Close(); err != nil {
		return nil, err
	}
	m, err := vae.Load(tmp.Name())
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return tabular.NewScorer(m, prefix)
}
