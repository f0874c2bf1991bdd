// Package tabular is the part of the Beam example that needs no Beam: it
// turns lines of CSV files into keyed records or dead letters, scores
// batches of records with a checkpoint, and generates the invented demo
// data set and model.
//
// # Record keys
//
// Every record gets a stable 64-bit key that seeds its scoring noise
// (vae.ScoreOptions.Keys), so its score is the same wherever, in whatever
// batch and on whatever worker it is scored. By default the key is
// LineKey(base name of the file, line number): FNV-1a (64 bit) of the
// file's base name, a zero byte and the decimal line number. Base names
// must then be unique across the input (part-00000.csv, part-00001.csv,
// ...), and a record keeps its key as long as its file keeps its name and
// the record its line. With an id column (ParserConfig.IDColumn) the key
// is IDKey(value), FNV-1a of the id's text, which survives re-sharding
// and re-ordering of the files; ids must then be unique.
//
// # Checkpoints
//
// The scoring pipeline needs, besides the model, the names of the CSV
// columns it reads and the standardisation the model was trained with. They
// travel in the checkpoint's extra metadata (vae.Model.SetExtra) under
// <prefix>.features (JSON list of column names), <prefix>.standardizer
// (JSON of dataset.Standardizer) and, optionally, <prefix>.threshold (the
// alarm threshold in nats); the prefix is "tabular" for the models this
// example trains. The telemetry example uses the same layout under the
// prefix "telemetry".
//
// The data and models of this package are invented for the demo; they are
// not evidence of anything.
package tabular
