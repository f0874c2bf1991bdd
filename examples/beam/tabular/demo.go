package tabular

import (
	"bufio"
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"

	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// DemoFeatures is the number of feature columns of the demo data.
const DemoFeatures = 8

// DemoColumns returns the demo data's feature column names.
func DemoColumns() []string {
	out := make([]string, DemoFeatures)
	for j := range out {
		out[j] = "f" + strconv.Itoa(j)
	}
	return out
}

// GenerateConfig configures Generate.
type GenerateConfig struct {
	Dir     string // created if missing
	Records int    // data records in all files together, >= 1
	Files   int    // files part-00000.csv, ...; 0 means 1
	// AnomalyRate is the fraction of records with one feature shifted far
	// from the others (0 means none).
	AnomalyRate float64
	// Malformed lines per file, put in place of records (so the file
	// holds Records/Files lines after its header either way); they cycle
	// through every kind of defect the parser reports.
	Malformed int
	Seed      uint64
}

// malformedLines are the defects the demo writes, with the id and the
// eight feature fields. Each must become a dead letter. (A value such as
// 1e300 is left out: it is a valid number to the sampling stage, which has
// no model to check ranges against, and would wreck the standardisation if
// sampled; the scoring pipeline's range check is tested separately.)
var malformedLines = []string{
	"%s,1.0,abc,3,4,5,6,7,8",   // not a number
	"%s,1.0,2,,4,5,6,7,8",      // empty field
	"%s,1.0,2,3",               // too few fields
	"%s,1.0,2,3,4,NaN,6,7,8",   // not finite
	"%s,1.0,2,3,4,5,1e999,7,8", // beyond float64
	"%s,\"1.0,2,3,4,5,6,7,8",   // unterminated quote
	"%s,1.0,2,3,4,5,6,7,8,9",   // too many fields
	"%s,1.0,2,3,4,5,6,7,1e300", // beyond float32 after standardising
}

// Generate writes the invented demo data set: CSV files with a header
// "id,f0,...,f7" and Records rows in all, returning the file paths. The
// features are smooth functions of a hidden phase and load plus noise;
// the same config always writes the same bytes.
func Generate(cfg GenerateConfig) ([]string, error) {
	if cfg.Records < 1 {
		return nil, fmt.Errorf("tabular.Generate: Records %d: want >= 1", cfg.Records)
	}
	if cfg.Files == 0 {
		cfg.Files = 1
	}
	if cfg.Files < 1 || cfg.Files > cfg.Records || cfg.Malformed < 0 || cfg.Malformed > cfg.Records/cfg.Files {
		return nil, fmt.Errorf("tabular.Generate: Files %d, Malformed %d for %d records: want 1 <= files <= records, 0 <= malformed <= records per file", cfg.Files, cfg.Malformed, cfg.Records)
	}
	if !(cfg.AnomalyRate >= 0 && cfg.AnomalyRate < 1) {
		return nil, fmt.Errorf("tabular.Generate: AnomalyRate %v: want 0 <= rate < 1", cfg.AnomalyRate)
	}
	if err := os.MkdirAll(cfg.Dir, 0o755); err != nil {
		return nil, err
	}
	var paths []string
	rec := 0
	for fi := range cfg.Files {
		n := (fi+1)*cfg.Records/cfg.Files - fi*cfg.Records/cfg.Files
		p := filepath.Join(cfg.Dir, fmt.Sprintf("part-%05d.csv", fi))
		if err := writeDemoFile(p, n, rec, fi, cfg); err != nil {
			return nil, err
		}
		paths = append(paths, p)
		rec += n
	}
	return paths, nil
}

func writeDemoFile(path string, n, first, fileIndex int, cfg GenerateConfig) (err error) {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	defer func() {
		if cerr := f.Close(); err == nil {
			err = cerr
		}
	}()
	w := bufio.NewWriterSize(f, 1<<16)
	w.WriteString("id")
	for _, c := range DemoColumns() {
		w.WriteString("," + c)
	}
	w.WriteByte('\n')
	rng := rand.New(rand.NewPCG(cfg.Seed, uint64(fileIndex)+1))
	// Malformed lines go at evenly spaced rows.
	bad := map[int]int{}
	for b := range cfg.Malformed {
		bad[(b*n)/cfg.Malformed+n/(2*cfg.Malformed)] = b
	}
	var x [DemoFeatures]float64
	buf := make([]byte, 0, 256)
	for i := range n {
		id := fmt.Sprintf("r%09d", first+i)
		demoRecord(rng, cfg.AnomalyRate, &x)
		if b, ok := bad[i]; ok {
			fmt.Fprintf(w, malformedLines[(b+fileIndex*cfg.Malformed)%len(malformedLines)]+"\n", id)
			continue
		}
		buf = append(buf[:0], id...)
		for _, v := range x {
			buf = append(buf, ',')
			buf = strconv.AppendFloat(buf, v, 'g', 7, 64)
		}
		buf = append(buf, '\n')
		w.Write(buf)
	}
	return w.Flush()
}

// demoRecord draws one invented record.
func demoRecord(rng *rand.Rand, anomalyRate float64, x *[DemoFeatures]float64) {
	u := 2 * math.Pi * rng.Float64() // hidden phase
	v := rng.NormFloat64()           // hidden load
	e := func(s float64) float64 { return s * rng.NormFloat64() }
	x[0] = 10 + 3*math.Sin(u) + v + e(0.2)
	x[1] = 5 + 2*math.Cos(u) + 0.5*v + e(0.2)
	x[2] = x[0]*x[1]/10 + e(0.2)
	x[3] = 50 + 4*v + e(0.5)
	x[4] = 1 + 0.3*math.Sin(2*u) + e(0.05)
	x[5] = 20 + 0.5*x[3] - x[0] + e(0.3)
	x[6] = math.Exp(0.1*v) + e(0.05)
	x[7] = 100 + 10*math.Sin(u)*math.Cos(u) + e(1)
	if anomalyRate > 0 && rng.Float64() < anomalyRate {
		j := rng.IntN(DemoFeatures)
		scale := []float64{3, 2, 2, 4, 0.3, 3, 0.2, 7}[j]
		x[j] += scale * (4 + 2*rng.Float64()) * float64(1-2*rng.IntN(2))
	}
}

// TrainConfig configures TrainModel.
type TrainConfig struct {
	Epochs int   // 0 means 20
	Hidden []int // nil means 32, 16
	Latent int   // 0 means 3
	// Alpha is the alarm's false-alarm rate: the threshold is the
	// split-conformal one of vae/alarm, calibrated on CalFrac of the
	// records held out from training. 0 means 0.01.
	Alpha float64
	// CalFrac is the share of records held out for calibration; 0 means
	// 0.2.
	CalFrac float64
	// Score is how the calibration scores are computed; it should match
	// how the pipeline scores.
	Score ScoreConfig
	Seed  uint64
}

// TrainModel standardises raw (records in the order of names), trains an
// MLP VAE with a learned-sigma Gaussian likelihood on it and stores the
// features and the standardisation in the model's metadata under
// DefaultPrefix, and the alarm calibration (vae/alarm, split conformal at
// Alpha on the held-out records) under alarm.MetadataKey.
func TrainModel(ctx context.Context, raw *dataset.Set, names []string, cfg TrainConfig) (*vae.Model, []vae.EpochInfo, error) {
	if cfg.Epochs == 0 {
		cfg.Epochs = 20
	}
	if cfg.Hidden == nil {
		cfg.Hidden = []int{32, 16}
	}
	if cfg.Latent == 0 {
		cfg.Latent = 3
	}
	if cfg.Alpha == 0 {
		cfg.Alpha = 0.01
	}
	if cfg.CalFrac == 0 {
		cfg.CalFrac = 0.2
	}
	if raw == nil || len(names) != raw.Features() {
		return nil, nil, fmt.Errorf("tabular.TrainModel: %d names for the data's features", len(names))
	}
	calRaw, trainRaw, err := raw.Split(cfg.CalFrac, cfg.Seed)
	if err != nil {
		return nil, nil, err
	}
	z, err := dataset.FitStandardizer(trainRaw)
	if err != nil {
		return nil, nil, err
	}
	data, err := z.Apply(trainRaw)
	if err != nil {
		return nil, nil, err
	}
	calData, err := z.Apply(calRaw)
	if err != nil {
		return nil, nil, err
	}
	lik, err := losses.NewLearnedGaussian("likelihood", raw.Features(), tensor.Float32)
	if err != nil {
		return nil, nil, err
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: raw.Features(), Hidden: cfg.Hidden, Latent: cfg.Latent, Likelihood: lik, Seed: cfg.Seed})
	if err != nil {
		return nil, nil, err
	}
	hist, err := m.Train(ctx, data, vae.TrainConfig{Epochs: cfg.Epochs, BatchSize: 128, LearnRate: 2e-3, Seed: cfg.Seed})
	if err != nil {
		return nil, hist, err
	}
	scores, err := m.Score(ctx, calData, vae.ScoreOptions{K: cfg.Score.K, Seed: cfg.Score.Seed, AtPosteriorMean: cfg.Score.AtPosteriorMean})
	if err != nil {
		return nil, hist, err
	}
	cal, err := alarm.Calibrate(scores, cfg.Alpha)
	if err != nil {
		return nil, hist, err
	}
	if err := alarm.Put(m, cal); err != nil {
		return nil, hist, err
	}
	if err := SetMeta(m, DefaultPrefix, Meta{Features: names, Standardizer: z, Threshold: math.NaN()}); err != nil {
		return nil, hist, err
	}
	return m, hist, nil
}

// SampleColumns are the bookkeeping columns of a sample file ahead of the
// features (see pipeline.FormatSample).
var SampleColumns = []string{"key", "file", "line", "id"}

// TrainFromSample reads a sample file written by the sampling pipeline
// (columns SampleColumns, then the features) and trains on it with
// TrainModel.
func TrainFromSample(ctx context.Context, path string, cfg TrainConfig) (*vae.Model, []vae.EpochInfo, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, nil, err
	}
	defer f.Close()
	raw, names, err := dataset.ReadCSV(f, path, dataset.CSVOptions{Ignore: SampleColumns})
	if err != nil {
		return nil, nil, err
	}
	return TrainModel(ctx, raw, names, cfg)
}
