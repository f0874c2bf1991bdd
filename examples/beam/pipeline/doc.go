// Package pipeline holds the Apache Beam transforms of the example: read
// CSV records from files matching a glob, score them in batches with a
// checkpoint, write scores, flags and embeddings in shards, send every line
// that cannot be scored to a dead-letter output, and draw a seeded uniform
// sample of fixed size for training.
//
// # Scoring
//
// ReadRecords matches the glob and reads each file line by line (keeping
// file and line number for keys and dead letters). ScoreRecords batches the
// records of each bundle: ProcessElement buffers, and a full buffer
// (Config.Batch records) or FinishBundle scores the buffer with one call of
// vae.Model.Score (and Encode, for embeddings), with each record's key as
// its noise key, so the pipeline's scores are exactly those of an
// in-process Score over the same records with the same seed and keys. The
// model is loaded once per DoFn instance, in Setup behind a sync.Once, from
// any path a Beam filesystem can read (local, gs://, ...).
//
// # Dead letters
//
// Nothing is dropped silently. A line that is not a record (bad CSV, wrong
// width, empty, non-numeric or non-finite field, a value that standardises
// beyond the model's float32 range, a header without the model's columns)
// becomes a tabular.DeadLetter with file, line, column and reason, is
// counted in the Beam counters dead_letters and dead_letters_<kind>
// (namespace "lowerbound"), and is written to the dead-letter shards.
//
// # Sampling
//
// Sample draws a uniform random sample of k records without replacement
// from a PCollection of any size, as a bottom-k sample (see package
// reservoir), which is mergeable and so runs as an ordinary combiner.
package pipeline
