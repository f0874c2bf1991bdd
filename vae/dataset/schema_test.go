package dataset_test

import (
	"errors"
	"math"
	"strings"
	"testing"

	"gonum.org/v1/gonum/stat"

	"lowerbound.dev/vae/dataset"
)

const schemaJSON = `{"columns": [
 {"name": "temp", "kind": "real"},
 {"name": "flow", "kind": "positive"},
 {"name": "starts", "kind": "count"},
 {"name": "open", "kind": "binary"},
 {"name": "mode", "kind": "categorical", "categories": ["idle", "run", "purge"]}
]}`

func readSchema(t *testing.T) dataset.Schema {
	t.Helper()
	sc, err := dataset.ReadSchema(strings.NewReader(schemaJSON), "schema.json")
	if err != nil {
		t.Fatal(err)
	}
	return sc
}

func TestReadCSVSchema(t *testing.T) {
	sc := readSchema(t)
	csv := "id,temp,flow,starts,open,mode\n" +
		"a,1.5,2.0,3,1,run\n" +
		"b,,0.5,0,0,purge\n" +
		"c,-2,NA,1,1,\n"
	s, names, err := dataset.ReadCSV(strings.NewReader(csv), "f.csv", dataset.CSVOptions{Schema: &sc, Missing: true})
	if err != nil {
		t.Fatal(err)
	}
	if strings.Join(names, ",") != "temp,flow,starts,open,mode" {
		t.Errorf("names %v", names)
	}
	nan := math.NaN()
	want := [][]float64{{1.5, 2, 3, 1, 1}, {nan, 0.5, 0, 0, 2}, {-2, nan, 1, 1, nan}}
	for i, row := range want {
		got := s.Row(i)
		for j, v := range row {
			if !(got[j] == v || math.IsNaN(v) && math.IsNaN(got[j])) {
				t.Errorf("record %d column %d = %v, want %v", i, j, got[j], v)
			}
			if s.Observed(i, j) == math.IsNaN(v) {
				t.Errorf("Observed(%d, %d) = %v", i, j, s.Observed(i, j))
			}
		}
	}
	if s.Missing() != 3 {
		t.Errorf("Missing = %d, want 3", s.Missing())
	}
	mask := make([]float64, 5)
	if err := s.FillMask(mask, []int{2}); err != nil {
		t.Fatal(err)
	}
	if mask[0] != 1 || mask[1] != 0 || mask[4] != 0 || mask[2] != 1 {
		t.Errorf("mask %v", mask)
	}
	if err := s.CheckSchema(sc); err != nil {
		t.Errorf("CheckSchema: %v", err)
	}
	// A subset keeps its missing entries.
	sub, _ := s.Subset([]int{0, 2})
	if sub.Missing() != 2 {
		t.Errorf("subset Missing = %d, want 2", sub.Missing())
	}
}

func TestReadCSVSchemaErrors(t *testing.T) {
	sc := readSchema(t)
	head := "temp,flow,starts,open,mode\n"
	for name, c := range map[string]struct {
		row     string
		missing bool
		want    string
	}{
		"unknown category": {"1,2,3,1,walk", false, `line 2, column 5 ("mode")`},
		"empty not opted":  {"1,,3,1,run", false, `line 2, column 2 ("flow"): empty value`},
		"positive":         {"1,-2,3,1,run", false, `line 2, column 2 ("flow")`},
		"count":            {"1,2,1.5,1,run", true, `line 2, column 3 ("starts")`},
		"binary":           {"1,2,1,2,run", true, `line 2, column 4 ("open")`},
		"not a number":     {"x,2,1,1,run", true, `line 2, column 1 ("temp")`},
	} {
		_, _, err := dataset.ReadCSV(strings.NewReader(head+c.row+"\n"), "f.csv", dataset.CSVOptions{Schema: &sc, Missing: c.missing})
		if !errors.Is(err, dataset.ErrInvalidData) || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: err = %v, want ErrInvalidData naming %s", name, err, c.want)
		}
	}
	// Without the opt-in, NaN is still an error naming record and feature.
	if _, err := dataset.New([]float64{1, math.NaN()}, 1, 2); !errors.Is(err, dataset.ErrInvalidData) || !strings.Contains(err.Error(), "record 0, feature 1") {
		t.Errorf("New with NaN: err = %v", err)
	}
	if _, err := dataset.NewMissing([]float64{1, math.Inf(1)}, 1, 2); !errors.Is(err, dataset.ErrInvalidData) {
		t.Errorf("NewMissing with Inf: err = %v", err)
	}
	for name, js := range map[string]string{
		"unknown field": `{"columns": [{"name": "a", "kind": "real", "unit": "K"}]}`,
		"bad kind":      `{"columns": [{"name": "a", "kind": "angle"}]}`,
		"one category":  `{"columns": [{"name": "a", "kind": "categorical", "categories": ["x"]}]}`,
		"duplicate":     `{"columns": [{"name": "a", "kind": "real"}, {"name": "a", "kind": "real"}]}`,
		"trailing":      `{"columns": [{"name": "a", "kind": "real"}]} {}`,
	} {
		if _, err := dataset.ReadSchema(strings.NewReader(js), "s.json"); err == nil {
			t.Errorf("%s: no error", name)
		}
	}
}

// FitStandardizer over observed entries only, against gonum
// stat.PopMeanStdDev of each column's observed values.
func TestFitStandardizerMissing(t *testing.T) {
	nan := math.NaN()
	x := []float64{1, 10, nan, 20, 4, nan, 7, 40, 2, 15}
	s, err := dataset.NewMissing(x, 5, 2)
	if err != nil {
		t.Fatal(err)
	}
	z, err := dataset.FitStandardizer(s)
	if err != nil {
		t.Fatal(err)
	}
	cols := [][]float64{{1, 4, 7, 2}, {10, 20, 40, 15}}
	for j, c := range cols {
		m, sd := stat.PopMeanStdDev(c, nil)
		if math.Abs(z.Mean[j]-m) > 1e-12 || math.Abs(z.Std[j]-sd) > 1e-12 {
			t.Errorf("column %d: mean %v std %v, want %v %v", j, z.Mean[j], z.Std[j], m, sd)
		}
	}
	a, err := z.Apply(s)
	if err != nil {
		t.Fatal(err)
	}
	if a.Missing() != 2 || !math.IsNaN(a.Row(1)[0]) {
		t.Errorf("Apply lost the missing entries: %v", a.Values())
	}
}
