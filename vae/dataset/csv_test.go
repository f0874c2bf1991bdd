package dataset

import (
	"slices"
	"strings"
	"testing"
)

func TestReadCSVGood(t *testing.T) {
	const in = "id, a ,b,label,c\n" +
		"x1,1.5,-2,1, 3e2\n" +
		"\n" + // blank lines are skipped
		"x2,0,0.25,0,4\n" +
		"\"x\n3\",7,8,2,9\n" // a quoted field spanning two lines
	s, names, err := ReadCSV(strings.NewReader(in), "good.csv", CSVOptions{Label: "label", Ignore: []string{"id"}})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(names, []string{"a", "b", "c"}) {
		t.Fatalf("names %v", names)
	}
	if !slices.Equal(s.Values(), []float64{1.5, -2, 300, 0, 0.25, 4, 7, 8, 9}) {
		t.Fatalf("values %v", s.Values())
	}
	if !slices.Equal(s.Labels(), []int{1, 0, 2}) || s.Classes() != 3 {
		t.Fatalf("labels %v classes %d", s.Labels(), s.Classes())
	}

	s, names, err = ReadCSV(strings.NewReader(in), "good.csv", CSVOptions{Columns: []string{"c", "a"}, Classes: 4, Label: "label"})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(names, []string{"c", "a"}) || !slices.Equal(s.Values(), []float64{300, 1.5, 4, 0, 9, 7}) || s.Classes() != 4 {
		t.Fatalf("names %v values %v classes %d", names, s.Values(), s.Classes())
	}

	s, names, err = ReadCSV(strings.NewReader("p;q\n1;2\n"), "semi.csv", CSVOptions{Comma: ';'})
	if err != nil || !slices.Equal(names, []string{"p", "q"}) || !slices.Equal(s.Values(), []float64{1, 2}) || s.HasLabels() {
		t.Fatalf("semicolon: %v %v %v", names, s, err)
	}
}

func TestReadCSVBadRows(t *testing.T) {
	// Every case has the header on line 1 and a good record on line 2; line
	// numbers are the 1-based lines of the file.
	const head = "a,b,label\n1,2,0\n"
	cases := []struct {
		name, body string
		opt        CSVOptions
		parts      []string
	}{
		{"NaN", "3,NaN,1\n", CSVOptions{}, []string{`line 3, column 2 ("b")`, "not finite"}},
		{"Inf", "+Inf,4,1\n", CSVOptions{}, []string{`line 3, column 1 ("a")`, "not finite"}},
		{"overflow", "1e999,4,1\n", CSVOptions{}, []string{`line 3, column 1 ("a")`, "out of float64 range"}},
		{"text", "3,4,1\n5,abc,0\n", CSVOptions{}, []string{`line 4, column 2 ("b")`, `"abc" is not a number`}},
		{"empty", "3,,1\n", CSVOptions{}, []string{`line 3, column 2 ("b")`, "empty value"}},
		{"blank only", "3,  ,1\n", CSVOptions{}, []string{`line 3, column 2 ("b")`, "empty value"}},
		{"short row", "3,4\n", CSVOptions{}, []string{"line 3:", "2 fields, header has 3"}},
		{"long row", "\n\n3,4,5,6\n", CSVOptions{}, []string{"line 5:", "4 fields, header has 3"}},
		// A bad quoted field spanning lines 3-4 is reported where it starts.
		{"multiline field", "\"x\n\",4,1\n", CSVOptions{}, []string{`line 3, column 1 ("a")`, "not a number"}},
		// A field that starts on the second line of its record gets that line.
		{"field on second line", "3,\"4\n\",x\n", CSVOptions{Label: "label"}, []string{`line 4, column 3 ("label")`, "not an integer"}},
		{"line after multiline", "3,4,\"1\n\"\n5,x,1\n", CSVOptions{Columns: []string{"a", "b"}}, []string{`line 5, column 2 ("b")`}},
		{"label text", "3,4,one\n", CSVOptions{Label: "label"}, []string{`line 3, column 3 ("label")`, "not an integer"}},
		{"label float", "3,4,1.0\n", CSVOptions{Label: "label"}, []string{`line 3, column 3 ("label")`, "not an integer"}},
		{"label negative", "3,4,-1\n", CSVOptions{Label: "label"}, []string{`line 3, column 3 ("label")`, "negative"}},
		{"label range", "3,4,2\n", CSVOptions{Label: "label", Classes: 2}, []string{`line 3, column 3 ("label")`, "out of range [0, 1]"}},
		{"label empty", "3,4,\n", CSVOptions{Label: "label"}, []string{`line 3, column 3 ("label")`, "empty label"}},
		{"bad quote", "3,4\"x,1\n", CSVOptions{}, []string{"line 3, byte 4 of the line", "quote"}},
	}
	for _, c := range cases {
		_, _, err := ReadCSV(strings.NewReader(head+c.body), "d.csv", c.opt)
		if err == nil {
			t.Fatalf("%s: no error", c.name)
		}
		mustErr(t, err, ErrInvalidData, append([]string{"d.csv"}, c.parts...)...)
	}
}

func TestReadCSVBadInput(t *testing.T) {
	_, _, err := ReadCSV(strings.NewReader(""), "e.csv", CSVOptions{})
	mustErr(t, err, ErrInvalidData, "e.csv", "line 1", "no header")
	_, _, err = ReadCSV(strings.NewReader("a,b\n"), "h.csv", CSVOptions{})
	mustErr(t, err, ErrInvalidData, "h.csv", "no records")
	_, _, err = ReadCSV(strings.NewReader("a,b,a\n1,2,3\n"), "dup.csv", CSVOptions{})
	mustErr(t, err, ErrInvalidData, "dup.csv", "line 1", "columns 1 and 3")
	_, _, err = ReadCSV(strings.NewReader("a,b\n1,2\n"), "x.csv", CSVOptions{Label: "y"})
	mustErr(t, err, ErrInvalidArgument, "opt.Label", `no column "y"`)
	_, _, err = ReadCSV(strings.NewReader("a,b\n1,2\n"), "x.csv", CSVOptions{Columns: []string{"a", "z"}})
	mustErr(t, err, ErrInvalidArgument, "opt.Columns", `no column "z"`)
	_, _, err = ReadCSV(strings.NewReader("a,b\n1,2\n"), "x.csv", CSVOptions{Columns: []string{"a"}, Ignore: []string{"b"}})
	mustErr(t, err, ErrInvalidArgument, "opt.Ignore")
	_, _, err = ReadCSV(strings.NewReader("a,b\n1,2\n"), "x.csv", CSVOptions{Label: "a", Ignore: []string{"b"}})
	mustErr(t, err, ErrInvalidArgument, "no feature columns")
	_, _, err = ReadCSV(strings.NewReader("a,b\n1,2\n"), "x.csv", CSVOptions{Label: "a", Columns: []string{"a"}})
	mustErr(t, err, ErrInvalidArgument, "label column")
	_, _, err = ReadCSV(nil, "x.csv", CSVOptions{})
	mustErr(t, err, ErrInvalidArgument, "r")
}
