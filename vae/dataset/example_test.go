package dataset_test

import (
	"fmt"
	"math/rand/v2"
	"strings"

	"lowerbound.dev/vae/dataset"
)

func ExampleBatches() {
	// In order (nil rng): 10 records in batches of 4, the last one ragged.
	b, err := dataset.Batches(10, 4, nil)
	if err != nil {
		panic(err)
	}
	fmt.Println(b)

	// Shuffled: the same seed always gives the same batches; keep one
	// generator for the whole run so every epoch gets a fresh order.
	rng := rand.New(rand.NewPCG(1, 0))
	for epoch := range 2 {
		b, _ := dataset.Batches(10, 4, rng)
		sizes := []int{}
		for _, batch := range b {
			sizes = append(sizes, len(batch))
		}
		fmt.Println("epoch", epoch, "batch sizes", sizes)
	}
	// Output:
	// [[0 1 2 3] [4 5 6 7] [8 9]]
	// epoch 0 batch sizes [4 4 2]
	// epoch 1 batch sizes [4 4 2]
}

func ExampleReadCSV() {
	const data = `id,temp,pressure,state
a1,20.5,1013,0
a2,22.0,1009,1
a3,19.0,1021,0
`
	s, names, err := dataset.ReadCSV(strings.NewReader(data), "sensors.csv", dataset.CSVOptions{
		Label:  "state",
		Ignore: []string{"id"},
	})
	if err != nil {
		panic(err)
	}
	fmt.Println(names, s.Len(), "records,", s.Classes(), "classes")
	fmt.Println(s.Row(1), s.Label(1))

	// A bad value is reported by file line and column.
	_, _, err = dataset.ReadCSV(strings.NewReader("temp,pressure\n20.5,1013\n21.0,NaN\n"), "bad.csv", dataset.CSVOptions{})
	fmt.Println(err)
	// Output:
	// [temp pressure] 3 records, 2 classes
	// [22 1009] 1
	// dataset.ReadCSV: bad.csv: line 3, column 2 ("pressure"): value "NaN" is not finite: invalid data
}

func ExampleFitStandardizer() {
	s, _ := dataset.FromRows([][]float64{{1, 10}, {3, 10}})
	z, _ := dataset.FitStandardizer(s)
	fmt.Println(z.Mean, z.Std) // the constant second feature keeps Std 1
	y, _ := z.Apply(s)
	fmt.Println(y.Values())
	// Output:
	// [2 10] [1 1]
	// [-1 0 1 0]
}

func ExampleSet_Fill() {
	s, _ := dataset.FromRows([][]float64{{0, 1}, {2, 3}, {4, 5}})
	batch := make([]float32, 2*s.Features()) // reused for every batch
	_ = s.Fill(batch, []int{2, 0})
	fmt.Println(batch)
	// Output: [4 5 0 1]
}
