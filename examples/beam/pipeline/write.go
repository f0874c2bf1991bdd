package pipeline

import (
	"bufio"
	"context"
	"encoding/csv"
	"fmt"
	"hash/fnv"
	"strconv"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/io/filesystem"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"

	"lowerbound.dev/examples/beam/tabular"
)

func init() {
	register.DoFn3x1[context.Context, int, func(*string) bool, error](&writeShardFn{})
	register.DoFn2x0[tabular.DeadLetter, func(int, string)](&keyDeadFn{})
}

// DeadHeader is the header of the dead-letter shards.
const DeadHeader = "file,line,column,column_name,kind,reason,text"

// WriteShards writes lines (KV<int, string>, the int a shard number in
// [0, shards)) to prefix-SSSSS-of-NNNNN.csv, one file per non-empty shard,
// each starting with header. The lines of a shard are grouped on one
// worker and written in the order the runner delivers them. Rewriting a
// shard (a retried bundle) writes the same lines again.
func WriteShards(s beam.Scope, prefix, header string, shards int, lines beam.PCollection) {
	s = s.Scope("WriteShards")
	filesystem.ValidateScheme(prefix)
	grouped := beam.GroupByKey(s, lines)
	beam.ParDo0(s, &writeShardFn{Prefix: prefix, Header: header, Shards: shards}, grouped)
}

// ShardName is the file name of shard i of n.
func ShardName(prefix string, i, n int) string {
	return fmt.Sprintf("%s-%05d-of-%05d.csv", prefix, i, n)
}

type writeShardFn struct {
	Prefix string
	Header string
	Shards int
}

func (w *writeShardFn) ProcessElement(ctx context.Context, shard int, lines func(*string) bool) error {
	name := ShardName(w.Prefix, shard, w.Shards)
	fs, err := filesystem.New(ctx, name)
	if err != nil {
		return err
	}
	defer fs.Close()
	fd, err := fs.OpenWrite(ctx, name)
	if err != nil {
		return err
	}
	buf := bufio.NewWriterSize(fd, 1<<20)
	buf.WriteString(w.Header)
	buf.WriteByte('\n')
	var line string
	for lines(&line) {
		buf.WriteString(line)
		if err := buf.WriteByte('\n'); err != nil {
			fd.Close()
			return fmt.Errorf("write %s: %w", name, err)
		}
	}
	if err := buf.Flush(); err != nil {
		fd.Close()
		return fmt.Errorf("write %s: %w", name, err)
	}
	return fd.Close()
}

// WriteDeadLetters writes dead letters (tabular.DeadLetter) as CSV shards
// with DeadHeader, keyed by file and line.
func WriteDeadLetters(s beam.Scope, prefix string, shards int, dead beam.PCollection) {
	s = s.Scope("WriteDeadLetters")
	keyed := beam.ParDo(s, &keyDeadFn{Shards: max(shards, 1)}, dead)
	WriteShards(s, prefix, DeadHeader, max(shards, 1), keyed)
}

type keyDeadFn struct{ Shards int }

func (f *keyDeadFn) ProcessElement(d tabular.DeadLetter, emit func(int, string)) {
	h := fnv.New64a()
	h.Write([]byte(d.File))
	h.Write([]byte(strconv.FormatInt(d.Line, 10)))
	emit(int(h.Sum64()%uint64(f.Shards)), FormatDeadLetter(d))
}

// FormatDeadLetter formats d as one CSV line of DeadHeader's columns.
func FormatDeadLetter(d tabular.DeadLetter) string {
	var b strings.Builder
	w := csv.NewWriter(&b)
	_ = w.Write([]string{d.File, strconv.FormatInt(d.Line, 10), strconv.Itoa(d.Column), d.ColumnName, d.Kind, d.Reason, d.Text})
	w.Flush()
	return strings.TrimSuffix(b.String(), "\n")
}
