package tabular

import (
	"encoding/csv"
	"errors"
	"fmt"
	"hash/fnv"
	"math"
	"path"
	"strconv"
	"strings"
)

// Record is one parsed CSV line.
type Record struct {
	Key    uint64    // see the package documentation
	File   string    // the file's path as matched
	Line   int64     // 1-based line number in the file (the header is line 1)
	ID     string    // the id column's value, or ""
	Values []float64 // the feature columns, in the model's feature order
}

// DeadLetter is a line that could not be scored, with the reason.
type DeadLetter struct {
	File string
	Line int64
	// Column is the 1-based position of the offending field, 0 when the
	// problem is the whole line or when it is found after parsing (a
	// value beyond the model's range, found when scoring, is named by
	// ColumnName alone); ColumnName is the field's header name, if known.
	Column     int
	ColumnName string
	// Kind is a short, fixed category (see the Kind* constants), Reason
	// the full explanation.
	Kind   string
	Reason string
	// Text is the line as read, cut to MaxTextInDeadLetter bytes.
	Text string
}

// Kinds of dead letters.
const (
	KindHeader     = "header"      // the file's header lacks a needed column
	KindCSV        = "csv"         // the line is not valid CSV (a stray quote, ...)
	KindWidth      = "width"       // the line has a different number of fields than the header
	KindEmpty      = "empty"       // a feature or id field is empty
	KindNotNumber  = "not_number"  // a feature field is not a number
	KindNotFinite  = "not_finite"  // NaN, Inf, or beyond the float64 range
	KindRange      = "range"       // the standardised value is beyond what the model's dtype holds
	KindLineLength = "line_length" // the line is longer than MaxLineBytes
	KindRead       = "read"        // the file could not be read to the end
)

// MaxLineBytes bounds a line; a longer one is a dead letter.
const MaxLineBytes = 1 << 20

// MaxTextInDeadLetter bounds the line text kept in a dead letter.
const MaxTextInDeadLetter = 1024

// String formats the dead letter as one line of text.
func (d DeadLetter) String() string {
	col := ""
	if d.Column > 0 {
		col = fmt.Sprintf(", column %d", d.Column)
		if d.ColumnName != "" {
			col += fmt.Sprintf(" (%q)", d.ColumnName)
		}
	}
	return fmt.Sprintf("%s: line %d%s: %s: %s", d.File, d.Line, col, d.Kind, d.Reason)
}

// LineKey is the default record key: FNV-1a (64 bit) of the file's base
// name, a zero byte and the decimal line number.
func LineKey(file string, line int64) uint64 {
	h := fnv.New64a()
	h.Write([]byte(path.Base(file)))
	h.Write([]byte{0})
	h.Write([]byte(strconv.FormatInt(line, 10)))
	return h.Sum64()
}

// IDKey is the record key of a record with an id column: FNV-1a (64 bit)
// of the id's text.
func IDKey(id string) uint64 {
	h := fnv.New64a()
	h.Write([]byte(id))
	return h.Sum64()
}

// ParserConfig says which columns a Parser reads.
type ParserConfig struct {
	Features []string // feature column names, in the model's order; required
	IDColumn string   // optional id column; its value keys the record
	Comma    rune     // field separator; 0 means ','
}

// Parser turns the lines of one CSV file into records. Make one per file
// with NewParser from the file's header line.
type Parser struct {
	file      string
	header    []string
	cols      []int // header position of every feature
	id        int   // header position of the id, or -1
	comma     rune
	headerErr *DeadLetter
}

// NewParser reads the header line (line 1) of file. A header that lacks a
// needed column does not fail: every line of the file then becomes a dead
// letter naming the problem, so that nothing is dropped silently. An
// error is returned only for a bad configuration.
func NewParser(file, header string, cfg ParserConfig) (*Parser, error) {
	if len(cfg.Features) == 0 {
		return nil, errors.New("tabular.NewParser: cfg.Features: empty")
	}
	p := &Parser{file: file, id: -1, comma: cfg.Comma}
	if p.comma == 0 {
		p.comma = ','
	}
	fields, err := p.split(header)
	if err != nil {
		p.headerErr = &DeadLetter{File: file, Line: 1, Kind: KindHeader, Reason: "header line: " + err.Error()}
		return p, nil
	}
	p.header = fields
	index := map[string]int{}
	for i, h := range fields {
		h = strings.TrimSpace(h)
		p.header[i] = h
		if j, dup := index[h]; dup {
			p.headerErr = &DeadLetter{File: file, Line: 1, Kind: KindHeader, Reason: fmt.Sprintf("header: columns %d and %d are both named %q", j+1, i+1, h)}
			return p, nil
		}
		index[h] = i
	}
	for _, name := range cfg.Features {
		j, ok := index[name]
		if !ok {
			p.headerErr = &DeadLetter{File: file, Line: 1, Kind: KindHeader, Reason: fmt.Sprintf("header has no column %q (header: %s)", name, strings.Join(p.header, ","))}
			return p, nil
		}
		p.cols = append(p.cols, j)
	}
	if cfg.IDColumn != "" {
		j, ok := index[cfg.IDColumn]
		if !ok {
			p.headerErr = &DeadLetter{File: file, Line: 1, Kind: KindHeader, Reason: fmt.Sprintf("header has no id column %q (header: %s)", cfg.IDColumn, strings.Join(p.header, ","))}
			return p, nil
		}
		p.id = j
	}
	return p, nil
}

// HeaderProblem returns the dead letter of a bad header line itself, or nil.
func (p *Parser) HeaderProblem() *DeadLetter { return p.headerErr }

// split splits one line into fields: a plain split when the line has no
// quote, encoding/csv otherwise.
func (p *Parser) split(text string) ([]string, error) {
	if !strings.ContainsRune(text, '"') {
		return strings.Split(text, string(p.comma)), nil
	}
	r := csv.NewReader(strings.NewReader(text))
	r.Comma = p.comma
	r.FieldsPerRecord = -1
	rec, err := r.Read()
	if err != nil {
		var pe *csv.ParseError
		if errors.As(err, &pe) {
			return nil, fmt.Errorf("byte %d: %v", pe.Column, pe.Err)
		}
		return nil, err
	}
	return rec, nil
}

// Parse turns line number line (1-based; the header is line 1) with text
// into a record, or into a dead letter saying why not. Blank lines give
// neither (ok false, nil dead letter).
func (p *Parser) Parse(line int64, text string) (rec Record, dead *DeadLetter, ok bool) {
	text = strings.TrimSuffix(text, "\r")
	if strings.TrimSpace(text) == "" {
		return Record{}, nil, false
	}
	letter := func(col int, kind, format string, a ...any) *DeadLetter {
		d := &DeadLetter{File: p.file, Line: line, Column: col, Kind: kind, Reason: fmt.Sprintf(format, a...), Text: cut(text)}
		if col > 0 && col <= len(p.header) {
			d.ColumnName = p.header[col-1]
		}
		return d
	}
	if p.headerErr != nil {
		return Record{}, letter(0, KindHeader, "file skipped: %s", p.headerErr.Reason), false
	}
	if len(text) > MaxLineBytes {
		return Record{}, letter(0, KindLineLength, "line of %d bytes, at most %d", len(text), MaxLineBytes), false
	}
	fields, err := p.split(text)
	if err != nil {
		return Record{}, letter(0, KindCSV, "not valid CSV: %v", err), false
	}
	if len(fields) != len(p.header) {
		return Record{}, letter(0, KindWidth, "%d fields, the header has %d", len(fields), len(p.header)), false
	}
	rec = Record{File: p.file, Line: line, Values: make([]float64, len(p.cols))}
	for k, j := range p.cols {
		s := strings.TrimSpace(fields[j])
		if s == "" {
			return Record{}, letter(j+1, KindEmpty, "empty value"), false
		}
		v, err := strconv.ParseFloat(s, 64)
		switch {
		case errors.Is(err, strconv.ErrRange):
			return Record{}, letter(j+1, KindNotFinite, "value %q is beyond the float64 range", s), false
		case err != nil:
			return Record{}, letter(j+1, KindNotNumber, "value %q is not a number", s), false
		case math.IsNaN(v) || math.IsInf(v, 0):
			return Record{}, letter(j+1, KindNotFinite, "value %q is not finite", s), false
		}
		rec.Values[k] = v
	}
	if p.id >= 0 {
		rec.ID = strings.TrimSpace(fields[p.id])
		if rec.ID == "" {
			return Record{}, letter(p.id+1, KindEmpty, "empty id"), false
		}
		rec.Key = IDKey(rec.ID)
	} else {
		rec.Key = LineKey(p.file, line)
	}
	return rec, nil, true
}

func cut(s string) string {
	if len(s) <= MaxTextInDeadLetter {
		return s
	}
	return s[:MaxTextInDeadLetter]
}
