package pipeline

import (
	"sort"
	"strconv"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/transforms/top"

	"lowerbound.dev/examples/beam/reservoir"
	"lowerbound.dev/examples/beam/tabular"
)

func init() {
	register.DoFn2x0[tabular.Record, func(SampleItem)](&prioritizeFn{})
	register.Emitter1[SampleItem]()
	register.Function2x1(lessSampleItem)
	register.DoFn2x0[[]SampleItem, func(string)](&formatSampleFn{})
	beam.RegisterType(typeOf[SampleItem]())
}

// SampleItem is a record with its sampling priority.
type SampleItem struct {
	Priority uint64
	Rec      tabular.Record
}

type prioritizeFn struct{ Seed uint64 }

func (f *prioritizeFn) ProcessElement(r tabular.Record, emit func(SampleItem)) {
	emit(SampleItem{Priority: reservoir.Priority(f.Seed, r.Key), Rec: r})
}

func lessSampleItem(a, b SampleItem) bool {
	return reservoir.Less(a.Priority, a.Rec.Key, b.Priority, b.Rec.Key)
}

// Sample draws a uniform sample of k records (tabular.Record) without
// replacement: the k records of smallest reservoir.Priority(seed, key), a
// bottom-k sample (see package reservoir). Beam's top.Smallest runs it as a
// combiner: every bundle keeps its k smallest and the partial results are
// merged, in any order, into the same k. The output is one []SampleItem,
// ordered by priority. The same input and seed give the same sample.
func Sample(s beam.Scope, records beam.PCollection, k int, seed uint64) beam.PCollection {
	s = s.Scope("Sample")
	items := beam.ParDo(s, &prioritizeFn{Seed: seed}, records)
	return top.Smallest(s, items, k, lessSampleItem)
}

// FormatSample turns the sample into one string holding a whole CSV file
// (so that no grouping can reorder its lines): a header
// "key,file,line,id,<features...>" and one line per record, in priority
// order, without the final newline.
func FormatSample(s beam.Scope, sample beam.PCollection, features []string) beam.PCollection {
	return beam.ParDo(s.Scope("FormatSample"), &formatSampleFn{Features: features}, sample)
}

type formatSampleFn struct{ Features []string }

func (f *formatSampleFn) ProcessElement(items []SampleItem, emit func(string)) {
	sort.Slice(items, func(i, j int) bool { return lessSampleItem(items[i], items[j]) })
	var b strings.Builder
	b.WriteString("key,file,line,id," + strings.Join(f.Features, ","))
	for _, it := range items {
		b.WriteByte('\n')
		b.WriteString(recordPrefix(it.Rec))
		for _, v := range it.Rec.Values {
			b.WriteByte(',')
			b.WriteString(strconv.FormatFloat(v, 'g', -1, 64))
		}
	}
	emit(b.String())
}
