package dataset

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
)

// CSVOptions controls ReadCSV. The zero value reads every column as a
// feature from comma-separated text.
type CSVOptions struct {
	// Comma is the field separator; 0 means ','.
	Comma rune
	// Label, when not empty, names the column holding each record's integer
	// class label (0, 1, 2, ...). That column is not a feature.
	Label string
	// Classes, when positive, is the number of classes: labels must lie in
	// [0, Classes). Zero infers it as the largest label plus one. Either way
	// it is at most MaxClasses.
	Classes int
	// Columns, when not empty, names the feature columns to keep, in the
	// order they become features. Empty means every column except Label and
	// those in Ignore, in file order.
	Columns []string
	// Ignore names columns to skip (identifiers, free text). It may not be
	// combined with Columns.
	Ignore []string
	// Schema, when not nil, gives the feature columns (its names, in its
	// order; Columns must then be empty) and their kinds: a categorical
	// column's cells are category strings, stored as their index in
	// Categories; other cells must be numbers that fit the kind (a
	// positive column > 0, a count a non-negative integer, a binary column
	// 0 or 1).
	Schema *Schema
	// Missing opts in to missing values: an empty cell, or a cell reading
	// NaN or NA (any case), becomes a missing entry (NaN in the Set; see
	// NewMissing). Without it such a cell is an error naming line and
	// column.
	Missing bool
}

// ReadCSV reads records from CSV text whose first row is a header of column
// names. Every other row is a record: the selected feature columns must hold
// finite numbers (anything strconv.ParseFloat accepts, surrounding spaces
// allowed) and the label column, if any, a non-negative integer. It returns
// the Set and the names of its features, in feature order. Labels must be
// below MaxClasses.
//
// name is used in error messages (usually the path). A bad value (empty,
// not a number, NaN, infinite, out of range) or a row of the wrong width is
// an error wrapping ErrInvalidData that names the file, the line (1-based
// line number in the file, so the header is line 1 and the first record
// usually line 2) and the column (1-based position and header name).
// Blank lines are skipped.
//
// Memory: reading n bytes allocates at most 256*n bytes plus 64 KiB (an
// error message that quotes an option, such as a Label not in the header,
// adds the option's length).
// Rows of numbers cost about 20 bytes per input byte; the bound is reached
// only by lines of many empty fields, which encoding/csv holds at about 140
// bytes per one-byte field.
func ReadCSV(r io.Reader, name string, opt CSVOptions) (*Set, []string, error) {
	const where = "dataset.ReadCSV"
	if r == nil {
		return nil, nil, argError(where, "r", "nil reader")
	}
	if opt.Classes < 0 || opt.Classes > MaxClasses {
		return nil, nil, argError(where, "opt.Classes", "class count %d not in [0, %d] (MaxClasses)", opt.Classes, MaxClasses)
	}
	if len(opt.Columns) > 0 && len(opt.Ignore) > 0 {
		return nil, nil, argError(where, "opt.Ignore", "cannot be combined with opt.Columns")
	}
	var schema []SchemaColumn
	if opt.Schema != nil {
		if len(opt.Columns) > 0 || len(opt.Ignore) > 0 {
			return nil, nil, argError(where, "opt.Schema", "cannot be combined with opt.Columns or opt.Ignore")
		}
		if err := opt.Schema.Validate(); err != nil {
			return nil, nil, fmt.Errorf("%s: opt.Schema: %w", where, err)
		}
		schema = opt.Schema.Columns
		opt.Columns = opt.Schema.Names()
	}
	cr := csv.NewReader(r)
	if opt.Comma != 0 {
		cr.Comma = opt.Comma
	}
	cr.FieldsPerRecord = -1 // widths are checked below, with a better message
	cr.ReuseRecord = true

	readErr := func(err error) error {
		var pe *csv.ParseError
		if errors.As(err, &pe) {
			return dataError(where, "%s: line %d, byte %d of the line: %v", name, pe.Line, pe.Column, pe.Err)
		}
		return fmt.Errorf("%s: %s: %w", where, name, err)
	}
	head, err := cr.Read()
	if err == io.EOF {
		return nil, nil, dataError(where, "%s: line 1: no header row", name)
	}
	if err != nil {
		return nil, nil, readErr(err)
	}
	header := append([]string(nil), head...)
	for i := range header {
		header[i] = strings.TrimSpace(header[i])
	}
	index := make(map[string]int, len(header))
	for i, h := range header {
		if j, dup := index[h]; dup {
			return nil, nil, dataError(where, "%s: line 1: columns %d and %d are both named %q", name, j+1, i+1, h)
		}
		index[h] = i
	}
	find := func(arg, col string) (int, error) {
		j, ok := index[col]
		if !ok {
			return 0, argError(where, arg, "%s has no column %q (header: %s)", name, col, strings.Join(header, ", "))
		}
		return j, nil
	}
	label := -1
	if opt.Label != "" {
		if label, err = find("opt.Label", opt.Label); err != nil {
			return nil, nil, err
		}
	}
	var cols []int
	if len(opt.Columns) > 0 {
		seen := map[int]bool{}
		for _, c := range opt.Columns {
			j, err := find("opt.Columns", c)
			if err != nil {
				return nil, nil, err
			}
			if j == label {
				return nil, nil, argError(where, "opt.Columns", "%q is the label column", c)
			}
			if seen[j] {
				return nil, nil, argError(where, "opt.Columns", "%q listed twice", c)
			}
			seen[j] = true
			cols = append(cols, j)
		}
	} else {
		skip := map[int]bool{label: true}
		for _, c := range opt.Ignore {
			j, err := find("opt.Ignore", c)
			if err != nil {
				return nil, nil, err
			}
			skip[j] = true
		}
		for j := range header {
			if !skip[j] {
				cols = append(cols, j)
			}
		}
	}
	if len(cols) == 0 {
		return nil, nil, argError(where, "opt", "no feature columns left in %s", name)
	}
	names := make([]string, len(cols))
	for k, j := range cols {
		names[k] = header[j]
	}

	var x []float64
	var labels []int
	n, missing := 0, 0
	for {
		rec, err := cr.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, nil, readErr(err)
		}
		line, _ := cr.FieldPos(0)
		if len(rec) != len(header) {
			return nil, nil, dataError(where, "%s: line %d: %d fields, header has %d", name, line, len(rec), len(header))
		}
		bad := func(j int, format string, a ...any) error {
			l, _ := cr.FieldPos(j)
			return dataError(where, "%s: line %d, column %d (%q): %s", name, l, j+1, header[j], fmt.Sprintf(format, a...))
		}
		for k, j := range cols {
			s := strings.TrimSpace(rec[j])
			if s == "" || opt.Missing && (strings.EqualFold(s, "nan") || strings.EqualFold(s, "na")) {
				if !opt.Missing {
					return nil, nil, bad(j, "empty value (set CSVOptions.Missing to read empty cells as missing)")
				}
				x = append(x, math.NaN())
				missing++
				continue
			}
			if schema != nil && schema[k].Kind == KindCategorical {
				c := schema[k].CategoryIndex(s)
				if c < 0 {
					return nil, nil, bad(j, "value %q is not one of the column's categories %q", s, schema[k].Categories)
				}
				x = append(x, float64(c))
				continue
			}
			v, err := strconv.ParseFloat(s, 64)
			switch {
			case errors.Is(err, strconv.ErrRange):
				return nil, nil, bad(j, "value %q out of float64 range", s)
			case err != nil:
				return nil, nil, bad(j, "value %q is not a number", s)
			case math.IsNaN(v) || math.IsInf(v, 0):
				return nil, nil, bad(j, "value %q is not finite", s)
			}
			if schema != nil {
				if msg := schema[k].checkValue(v); msg != "" {
					return nil, nil, bad(j, "value %q %s", s, msg)
				}
			}
			x = append(x, v)
		}
		if label >= 0 {
			s := strings.TrimSpace(rec[label])
			if s == "" {
				return nil, nil, bad(label, "empty label")
			}
			v, err := strconv.Atoi(s)
			if err != nil {
				return nil, nil, bad(label, "label %q is not an integer", s)
			}
			if msg := labelProblem(v, opt.Classes); msg != "" {
				return nil, nil, bad(label, "%s", msg)
			}
			labels = append(labels, v)
		}
		n++
	}
	if n == 0 {
		return nil, nil, dataError(where, "%s: no records after the header", name)
	}
	s := &Set{x: x, n: n, f: len(cols), shape: []int{len(cols)}, missing: missing}
	if label >= 0 {
		classes, err := checkLabels(where, name, labels, opt.Classes)
		if err != nil {
			return nil, nil, err
		}
		s.labels, s.classes = labels, classes
	}
	return s, names, nil
}
