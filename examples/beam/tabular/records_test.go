package tabular

import (
	"hash/fnv"
	"testing"
)

func TestParseDeadLetters(t *testing.T) {
	p, err := NewParser("dir/a.csv", "id,f0,f1", ParserConfig{Features: []string{"f1", "f0"}})
	if err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		text   string
		kind   string
		column int
	}{
		{"r1,1,abc", KindNotNumber, 3},
		{"r1,,2", KindEmpty, 2},
		{"r1,1", KindWidth, 0},
		{"r1,1,2,3", KindWidth, 0},
		{"r1,NaN,2", KindNotFinite, 2},
		{"r1,1,-Inf", KindNotFinite, 3},
		{"r1,1e999,2", KindNotFinite, 2},
		{`r1,"1,2`, KindCSV, 0},
	}
	for i, c := range cases {
		_, d, ok := p.Parse(int64(i+2), c.text)
		if ok || d == nil {
			t.Errorf("%q: parsed, want a dead letter", c.text)
			continue
		}
		if d.Kind != c.kind || d.Column != c.column || d.Line != int64(i+2) || d.File != "dir/a.csv" || d.Text != c.text {
			t.Errorf("%q: dead letter %+v, want kind %s, column %d, line %d", c.text, *d, c.kind, c.column, i+2)
		}
	}
	rec, d, ok := p.Parse(9, ` r9 , 1.5 ,"2"`)
	if !ok || d != nil {
		t.Fatalf("good line: %v", d)
	}
	// Features come in the configured order (f1, f0).
	if rec.Values[0] != 2 || rec.Values[1] != 1.5 || rec.Line != 9 {
		t.Errorf("good line: %+v", rec)
	}
	// The default key is FNV-1a of base name, zero byte and line number
	// (hash/fnv from the standard library computes the reference).
	h := fnv.New64a()
	h.Write([]byte("a.csv\x009"))
	if rec.Key != h.Sum64() {
		t.Errorf("key %d, want FNV-1a of \"a.csv\\x009\" = %d", rec.Key, h.Sum64())
	}
	if _, d, ok := p.Parse(10, "  "); ok || d != nil {
		t.Error("a blank line must give neither record nor dead letter")
	}
}

func TestParseBadHeader(t *testing.T) {
	p, err := NewParser("b.csv", "id,f0", ParserConfig{Features: []string{"f0", "f1"}})
	if err != nil {
		t.Fatal(err)
	}
	if p.HeaderProblem() == nil || p.HeaderProblem().Kind != KindHeader {
		t.Fatalf("header without f1: %+v", p.HeaderProblem())
	}
	if _, d, ok := p.Parse(2, "r,1"); ok || d == nil || d.Kind != KindHeader {
		t.Errorf("line under a bad header: %+v", d)
	}
}

func TestIDKey(t *testing.T) {
	p, _ := NewParser("c.csv", "id,f0", ParserConfig{Features: []string{"f0"}, IDColumn: "id"})
	rec, _, ok := p.Parse(2, "abc,1")
	h := fnv.New64a()
	h.Write([]byte("abc"))
	if !ok || rec.Key != h.Sum64() || rec.ID != "abc" {
		t.Errorf("id key: %+v, want FNV-1a of \"abc\"", rec)
	}
	if _, d, _ := p.Parse(3, ",1"); d == nil || d.Kind != KindEmpty || d.Column != 1 {
		t.Errorf("empty id: %+v", d)
	}
}
