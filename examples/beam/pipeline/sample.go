package pipeline

import (
	"container/heap"
	"sort"
	"strconv"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"

	"lowerbound.dev/examples/beam/reservoir"
	"lowerbound.dev/examples/beam/tabular"
)

func init() {
	register.DoFn2x0[tabular.Record, func(SampleItem)](&prioritizeFn{})
	register.Emitter1[SampleItem]()
	register.Combiner3[sampleAcc, SampleItem, []SampleItem](&bottomKFn{})
	beam.RegisterType(typeOf[sampleAcc]())
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
// bottom-k sample (see package reservoir). It runs as a combiner: every
// bundle keeps its k smallest in a heap and the partial results are
// merged, in any order, into the same k. The output is one []SampleItem,
// ordered by priority. The same input and seed give the same sample.
func Sample(s beam.Scope, records beam.PCollection, k int, seed uint64) beam.PCollection {
	s = s.Scope("Sample")
	items := beam.ParDo(s, &prioritizeFn{Seed: seed}, records)
	return beam.Combine(s, &bottomKFn{K: k}, items)
}

// sampleAcc is a partial sample: a max-heap by (priority, key) of at most
// K items, whose root is the item the next smaller one evicts.
type sampleAcc struct{ Items []SampleItem }

func (a *sampleAcc) Len() int           { return len(a.Items) }
func (a *sampleAcc) Less(i, j int) bool { return lessSampleItem(a.Items[j], a.Items[i]) }
func (a *sampleAcc) Swap(i, j int)      { a.Items[i], a.Items[j] = a.Items[j], a.Items[i] }
func (a *sampleAcc) Push(x any)         { a.Items = append(a.Items, x.(SampleItem)) }
func (a *sampleAcc) Pop() any {
	x := a.Items[len(a.Items)-1]
	a.Items = a.Items[:len(a.Items)-1]
	return x
}

// bottomKFn keeps the K items of smallest priority.
type bottomKFn struct{ K int }

func (f *bottomKFn) CreateAccumulator() sampleAcc { return sampleAcc{} }

func (f *bottomKFn) AddInput(a sampleAcc, it SampleItem) sampleAcc {
	if len(a.Items) < f.K {
		heap.Push(&a, it)
	} else if lessSampleItem(it, a.Items[0]) {
		a.Items[0] = it
		heap.Fix(&a, 0)
	}
	return a
}

func (f *bottomKFn) MergeAccumulators(a, b sampleAcc) sampleAcc {
	for _, it := range b.Items {
		a = f.AddInput(a, it)
	}
	return a
}

func (f *bottomKFn) ExtractOutput(a sampleAcc) []SampleItem {
	out := append([]SampleItem(nil), a.Items...)
	sort.Slice(out, func(i, j int) bool { return lessSampleItem(out[i], out[j]) })
	return out
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
