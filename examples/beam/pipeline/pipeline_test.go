package pipeline_test

import (
	"context"
	"encoding/csv"
	"flag"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"testing"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"

	"lowerbound.dev/examples/beam/pipeline"
	"lowerbound.dev/examples/beam/reservoir"
	"lowerbound.dev/examples/beam/tabular"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// TestMain initialises Beam (required before any pipeline runs; the
// pipelines run on prism, in this process).
func TestMain(m *testing.M) {
	flag.Parse()
	beam.Init()
	os.Exit(m.Run())
}

// readShards reads every CSV shard matching glob, checks each starts with
// header and returns the rows after it.
func readShards(t *testing.T, glob, header string) [][]string {
	t.Helper()
	files, err := filepath.Glob(glob)
	if err != nil || len(files) == 0 {
		t.Fatalf("no shards match %s (%v)", glob, err)
	}
	var rows [][]string
	for _, f := range files {
		b, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		r := csv.NewReader(strings.NewReader(string(b)))
		r.FieldsPerRecord = -1
		all, err := r.ReadAll()
		if err != nil {
			t.Fatalf("%s: %v", f, err)
		}
		if strings.Join(all[0], ",") != header {
			t.Fatalf("%s: header %q, want %q", f, strings.Join(all[0], ","), header)
		}
		rows = append(rows, all[1:]...)
	}
	return rows
}

// trainSmall trains a small model on the first file and saves it.
func trainSmall(t *testing.T, file, path string) *vae.Model {
	t.Helper()
	f, err := os.Open(file)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	raw, names, err := dataset.ReadCSV(f, file, dataset.CSVOptions{Ignore: []string{"id"}})
	if err != nil {
		t.Fatal(err)
	}
	if raw.Len() > 5000 {
		if raw, err = raw.Subset(seq(5000)); err != nil {
			t.Fatal(err)
		}
	}
	m, _, err := tabular.TrainModel(context.Background(), raw, names, tabular.TrainConfig{Epochs: 2, Seed: 3, Score: tabular.ScoreConfig{K: 1, Seed: 3}})
	if err != nil {
		t.Fatal(err)
	}
	// The pipeline's threshold is the checkpoint's vae/alarm calibration:
	// the ceil((n+1)(1-alpha))-th smallest of the n held-out scores (split
	// conformal; Angelopoulos and Bates 2021), recomputed here from the
	// stored scores.
	cal, err := alarm.Get(m)
	if err != nil {
		t.Fatal(err)
	}
	meta, err := tabular.ReadMeta(m, tabular.DefaultPrefix)
	if err != nil {
		t.Fatal(err)
	}
	sc := cal.Scores()
	sort.Float64s(sc)
	rank := int(math.Ceil(float64(len(sc)+1) * (1 - 0.01)))
	if cal.Alpha() != 0.01 || len(sc) != raw.Len()/5 || meta.Threshold != sc[rank-1] {
		t.Fatalf("threshold %v, alpha %v, %d calibration scores; want the %d-th smallest of %d held-out scores, %v",
			meta.Threshold, cal.Alpha(), len(sc), rank, raw.Len()/5, sc[rank-1])
	}
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	return m
}

func seq(n int) []int {
	s := make([]int, n)
	for i := range s {
		s[i] = i
	}
	return s
}

// TestScoresEqualInProcess: the pipeline's scores and embeddings are, bit
// for bit, those of an in-process vae.Model.Score and Encode over the same
// records with the same seed and keys. The reference reads the files with
// the SDK's own CSV reader (dataset.ReadCSV), not with the pipeline's
// parser.
func TestScoresEqualInProcess(t *testing.T) {
	records, files := 100000, 4
	if testing.Short() {
		records = 8000
	}
	dir := t.TempDir()
	paths, err := tabular.Generate(tabular.GenerateConfig{Dir: filepath.Join(dir, "data"), Records: records, Files: files, AnomalyRate: 0.01, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	modelPath := filepath.Join(dir, "model.safetensors")
	trainSmall(t, paths[0], modelPath)
	m, err := vae.Load(modelPath)
	if err != nil {
		t.Fatal(err)
	}
	meta, err := tabular.ReadMeta(m, tabular.DefaultPrefix)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	cfg := pipeline.Config{Input: filepath.Join(dir, "data", "*.csv"), Model: modelPath, Out: filepath.Join(dir, "out"),
		Score: tabular.ScoreConfig{K: 4, Seed: 11}, Threshold: math.NaN(), Embed: true, Batch: 1000, Shards: 3}
	p, _, err := pipeline.BuildScore(ctx, cfg)
	if err != nil {
		t.Fatal(err)
	}
	counters, err := pipeline.Run(ctx, p)
	if err != nil {
		t.Fatal(err)
	}
	if counters[pipeline.CounterScored] != int64(records) || counters[pipeline.CounterDead] != 0 || counters[pipeline.CounterLines] != int64(records) {
		t.Fatalf("counters %v, want %d lines read and scored, no dead letters", counters, records)
	}
	type out struct {
		score string
		flag  string
		emb   []string
	}
	got := map[uint64]*out{}
	for _, row := range readShards(t, filepath.Join(dir, "out", "scores-*.csv"), pipeline.ScoresHeader) {
		k, err := strconv.ParseUint(row[0], 10, 64)
		if err != nil {
			t.Fatal(err)
		}
		if got[k] != nil {
			t.Fatalf("key %d twice", k)
		}
		got[k] = &out{score: row[4], flag: row[5]}
	}
	for _, row := range readShards(t, filepath.Join(dir, "out", "embeddings-*.csv"), pipeline.EmbeddingsHeader(m.Latent())) {
		k, _ := strconv.ParseUint(row[0], 10, 64)
		if got[k] == nil {
			t.Fatalf("embedding of key %d without a score", k)
		}
		got[k].emb = row[4:]
	}
	if len(got) != records {
		t.Fatalf("%d scored keys, want %d", len(got), records)
	}
	checked, flagged := 0, 0
	for _, path := range paths {
		f, err := os.Open(path)
		if err != nil {
			t.Fatal(err)
		}
		raw, names, err := dataset.ReadCSV(f, path, dataset.CSVOptions{Columns: meta.Features})
		f.Close()
		if err != nil {
			t.Fatal(err)
		}
		if strings.Join(names, ",") != strings.Join(meta.Features, ",") {
			t.Fatalf("columns %v", names)
		}
		x, err := meta.Standardizer.Apply(raw)
		if err != nil {
			t.Fatal(err)
		}
		keys := make([]uint64, x.Len())
		for i := range keys {
			keys[i] = tabular.LineKey(path, int64(i+2)) // the header is line 1
		}
		want, err := m.Score(ctx, x, vae.ScoreOptions{K: 4, Seed: 11, Keys: keys})
		if err != nil {
			t.Fatal(err)
		}
		mu, _, err := m.Encode(ctx, x)
		if err != nil {
			t.Fatal(err)
		}
		for i, k := range keys {
			o := got[k]
			if o == nil {
				t.Fatalf("%s line %d: no output", path, i+2)
			}
			s, err := strconv.ParseFloat(o.score, 64)
			if err != nil || s != want[i] {
				t.Fatalf("%s line %d: pipeline score %s, in-process Score %v", path, i+2, o.score, want[i])
			}
			if wantFlag := strconv.FormatBool(want[i] > meta.Threshold); o.flag != wantFlag {
				t.Fatalf("%s line %d: flagged %q, want %s (threshold %v)", path, i+2, o.flag, wantFlag, meta.Threshold)
			}
			if o.flag == "true" {
				flagged++
			}
			if len(o.emb) != m.Latent() {
				t.Fatalf("%s line %d: embedding %v", path, i+2, o.emb)
			}
			for j, e := range o.emb {
				v, err := strconv.ParseFloat(e, 64)
				if err != nil || v != mu.At(i, j) {
					t.Fatalf("%s line %d: embedding %d is %s, in-process Encode %v", path, i+2, j, e, mu.At(i, j))
				}
			}
			checked++
		}
	}
	if checked != records {
		t.Fatalf("checked %d records, want %d", checked, records)
	}
	if counters[pipeline.CounterFlagged] != int64(flagged) {
		t.Errorf("counter %s = %d, the outputs flag %d", pipeline.CounterFlagged, counters[pipeline.CounterFlagged], flagged)
	}
}

// TestDeadLetters: every malformed line reaches the dead-letter output with
// its file, line, column and kind, the counters count them, and the good
// lines are scored: nothing is dropped.
func TestDeadLetters(t *testing.T) {
	dir := t.TempDir()
	data := filepath.Join(dir, "data")
	paths, err := tabular.Generate(tabular.GenerateConfig{Dir: data, Records: 2000, Files: 1, Seed: 8})
	if err != nil {
		t.Fatal(err)
	}
	modelPath := filepath.Join(dir, "model.safetensors")
	trainSmall(t, paths[0], modelPath)
	cols := strings.Join(tabular.DemoColumns(), ",")
	good := "r,10,5,5,50,1,35,1,100"
	lines := []string{
		"id," + cols,               // line 1
		good,                       // 2
		"r,10,x,5,50,1,35,1,100",   // 3: not a number, column 3 (f1)
		"r,10,5,,50,1,35,1,100",    // 4: empty, column 4 (f2)
		"r,10,5",                   // 5: width
		"",                         // 6: blank, skipped
		"r,10,5,5,50,1,35,1,Inf",   // 7: not finite, column 9 (f7)
		`r,"10,5,5,50,1,35,1,100`,  // 8: bad CSV
		"r,10,5,5,50,1,35,1,1e300", // 9: beyond float32 once standardised (f7)
		good,                       // 10
	}
	if err := os.WriteFile(filepath.Join(data, "bad.csv"), []byte(strings.Join(lines, "\n")+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	// A file whose header lacks f7: its header and both lines are dead letters.
	if err := os.WriteFile(filepath.Join(data, "nohead.csv"), []byte("id,f0\nr,1\nr,2\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	p, _, err := pipeline.BuildScore(ctx, pipeline.Config{Input: filepath.Join(data, "*.csv"), Model: modelPath, Out: filepath.Join(dir, "out"),
		Score: tabular.ScoreConfig{K: 1, Seed: 1}, Threshold: math.NaN(), Shards: 2})
	if err != nil {
		t.Fatal(err)
	}
	counters, err := pipeline.Run(ctx, p)
	if err != nil {
		t.Fatal(err)
	}
	type want struct {
		kind   string
		column int
		name   string
	}
	bad := filepath.Join(data, "bad.csv")
	nohead := filepath.Join(data, "nohead.csv")
	wants := map[string]want{
		bad + ":3":    {tabular.KindNotNumber, 3, "f1"},
		bad + ":4":    {tabular.KindEmpty, 4, "f2"},
		bad + ":5":    {tabular.KindWidth, 0, ""},
		bad + ":7":    {tabular.KindNotFinite, 9, "f7"},
		bad + ":8":    {tabular.KindCSV, 0, ""},
		bad + ":9":    {tabular.KindRange, 0, "f7"},
		nohead + ":1": {tabular.KindHeader, 0, ""},
		nohead + ":2": {tabular.KindHeader, 0, ""},
		nohead + ":3": {tabular.KindHeader, 0, ""},
	}
	rows := readShards(t, filepath.Join(dir, "out", "dead_letters-*.csv"), pipeline.DeadHeader)
	if len(rows) != len(wants) {
		t.Errorf("%d dead letters, want %d: %v", len(rows), len(wants), rows)
	}
	for _, r := range rows {
		w, ok := wants[r[0]+":"+r[1]]
		if !ok {
			t.Errorf("unexpected dead letter %v", r)
			continue
		}
		if r[4] != w.kind || r[2] != strconv.Itoa(w.column) || r[3] != w.name || r[5] == "" {
			t.Errorf("dead letter %v: want kind %s, column %d (%q) and a reason", r, w.kind, w.column, w.name)
		}
	}
	wantCounts := map[string]int64{
		pipeline.CounterLines:                   2000 + 8 + 2, // data lines: generated, bad.csv without header and blank, nohead.csv
		pipeline.CounterScored:                  2000 + 2,
		pipeline.CounterDead:                    int64(len(wants)),
		"dead_letters_" + tabular.KindHeader:    3,
		"dead_letters_" + tabular.KindNotNumber: 1,
		"dead_letters_" + tabular.KindRange:     1,
	}
	for name, v := range wantCounts {
		if counters[name] != v {
			t.Errorf("counter %s = %d, want %d (all: %v)", name, counters[name], v, counters)
		}
	}
	// Nothing dropped: every data line is scored or a dead letter (the
	// header problem adds one letter for line 1).
	if counters[pipeline.CounterLines] != counters[pipeline.CounterScored]+counters[pipeline.CounterDead]-1 {
		t.Errorf("lines %d != scored %d + dead letters %d - 1", counters[pipeline.CounterLines], counters[pipeline.CounterScored], counters[pipeline.CounterDead])
	}
}

// TestSampleRepeatable: the sampling pipeline gives the same sample for
// the same input and seed, another for another seed, and exactly the
// bottom-k sample that reservoir.BottomK draws in one sequential pass.
func TestSampleRepeatable(t *testing.T) {
	dir := t.TempDir()
	data := filepath.Join(dir, "data")
	paths, err := tabular.Generate(tabular.GenerateConfig{Dir: data, Records: 6000, Files: 3, Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	const k = 250
	run := func(seed uint64, name string) []string {
		out := filepath.Join(dir, name+".csv")
		p, err := pipeline.BuildSample(pipeline.SampleConfig{Input: filepath.Join(data, "*.csv"), Features: tabular.DemoColumns(), K: k, Seed: seed,
			Out: out, Dead: filepath.Join(dir, name+"-dead")})
		if err != nil {
			t.Fatal(err)
		}
		if _, err := pipeline.Run(context.Background(), p); err != nil {
			t.Fatal(err)
		}
		b, err := os.ReadFile(out)
		if err != nil {
			t.Fatal(err)
		}
		return strings.Split(strings.TrimSpace(string(b)), "\n")
	}
	a, b, c := run(7, "a"), run(7, "b"), run(8, "c")
	if len(a) != k+1 {
		t.Fatalf("sample file has %d lines, want header and %d records", len(a), k)
	}
	if strings.Join(a, "\n") != strings.Join(b, "\n") {
		t.Error("the same seed gave different samples")
	}
	if strings.Join(a, "\n") == strings.Join(c, "\n") {
		t.Error("another seed gave the same sample")
	}
	seqK := reservoir.NewBottomK[string](k, 7)
	for _, path := range paths {
		for line := int64(2); line <= 2001; line++ {
			seqK.Add(tabular.LineKey(path, line), filepath.Base(path)+":"+strconv.FormatInt(line, 10))
		}
	}
	for i, it := range seqK.Items() {
		f := strings.Split(a[i+1], ",")
		if got := filepath.Base(f[1]) + ":" + f[2]; got != it.Value || f[0] != strconv.FormatUint(it.Key, 10) {
			t.Fatalf("sample record %d is %s (key %s), sequential bottom-k has %s (key %d)", i, got, f[0], it.Value, it.Key)
		}
	}
	// The sample trains a model that the scoring pipeline can load.
	m, _, err := tabular.TrainFromSample(context.Background(), filepath.Join(dir, "a.csv"), tabular.TrainConfig{Epochs: 1, Seed: 1, Alpha: 0.05}) // 50 held-out records: enough for 5% (19 needed), not for 1% (99)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := tabular.NewScorer(m, tabular.DefaultPrefix); err != nil {
		t.Fatal(err)
	}
}
