package dataset

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"slices"
)

// The column kinds of a Schema. They name the same observation models as
// the losses.Column kinds (losses.ColumnReal and so on) and have the same
// spelling, so a schema converts to a likelihood one column at a time.
const (
	KindReal        = "real"        // any finite number
	KindPositive    = "positive"    // a number > 0
	KindCount       = "count"       // 0, 1, 2, ...
	KindBinary      = "binary"      // 0 or 1
	KindCategorical = "categorical" // one of Categories, stored as its index
)

// MaxCategories bounds the categories of one categorical column.
const MaxCategories = 1 << 16

// SchemaColumn describes one column of a record.
type SchemaColumn struct {
	// Name is the column's header in a CSV file.
	Name string `json:"name"`
	// Kind is one of the Kind constants.
	Kind string `json:"kind"`
	// Categories lists the values a categorical column may take, as they
	// are written in a file; category k is stored in the record as the
	// number k. Empty for every other kind.
	Categories []string `json:"categories,omitempty"`
}

// Schema says which column of a record is which. It is JSON-ready: stored
// in a checkpoint's metadata it lets a loaded model read raw files the
// same way as the files it was trained on.
//
// Raw-record layout versus model-input layout: a record of a Set read
// with a schema holds one value per schema column (a categorical column
// holds the category index, a missing entry NaN). A model's encoder sees
// another layout, in which a categorical column becomes its one-hot
// vector and the observation mask is appended; the model builds it (see
// losses.Columns and the vae package), so data is always passed in the
// record layout.
type Schema struct {
	Columns []SchemaColumn `json:"columns"`
}

// Validate checks that the schema has columns, unique non-empty names,
// known kinds, and between 2 and MaxCategories distinct categories on each
// categorical column (and none on the others).
func (s Schema) Validate() error {
	const where = "dataset.Schema.Validate"
	if len(s.Columns) == 0 {
		return argError(where, "Columns", "empty")
	}
	seen := map[string]int{}
	for j, c := range s.Columns {
		if c.Name == "" {
			return argError(where, fmt.Sprintf("column %d", j), "empty name")
		}
		if k, dup := seen[c.Name]; dup {
			return argError(where, fmt.Sprintf("column %d", j), "name %q is also column %d's", c.Name, k)
		}
		seen[c.Name] = j
		switch c.Kind {
		case KindReal, KindPositive, KindCount, KindBinary:
			if len(c.Categories) > 0 {
				return argError(where, fmt.Sprintf("column %d (%q)", j, c.Name), "a %s column has no categories", c.Kind)
			}
		case KindCategorical:
			if len(c.Categories) < 2 || len(c.Categories) > MaxCategories {
				return argError(where, fmt.Sprintf("column %d (%q)", j, c.Name), "%d categories, want 2 to %d", len(c.Categories), MaxCategories)
			}
			cats := map[string]bool{}
			for _, v := range c.Categories {
				if cats[v] {
					return argError(where, fmt.Sprintf("column %d (%q)", j, c.Name), "category %q listed twice", v)
				}
				cats[v] = true
			}
		default:
			return argError(where, fmt.Sprintf("column %d (%q)", j, c.Name), "unknown kind %q (want real, positive, count, binary or categorical)", c.Kind)
		}
	}
	return nil
}

// Names returns the column names in order.
func (s Schema) Names() []string {
	out := make([]string, len(s.Columns))
	for j, c := range s.Columns {
		out[j] = c.Name
	}
	return out
}

// ReadSchema reads a schema from JSON, strictly: one object, no unknown
// fields, nothing after it; then Validate. name is used in errors.
func ReadSchema(r io.Reader, name string) (Schema, error) {
	const where = "dataset.ReadSchema"
	var s Schema
	if r == nil {
		return s, argError(where, "r", "nil reader")
	}
	b, err := io.ReadAll(io.LimitReader(r, 1<<24))
	if err != nil {
		return s, fmt.Errorf("%s: %s: %w", where, name, err)
	}
	dec := json.NewDecoder(bytes.NewReader(b))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&s); err != nil {
		return s, dataError(where, "%s: %v", name, err)
	}
	if dec.More() {
		return s, dataError(where, "%s: data after the schema at byte %d", name, dec.InputOffset())
	}
	if err := s.Validate(); err != nil {
		return s, fmt.Errorf("%s: %s: %w", where, name, err)
	}
	return s, nil
}

// checkValue reports why v cannot be a value of column c ("" when it can).
// NaN (missing) is accepted here; the caller decides about missing values.
func (c SchemaColumn) checkValue(v float64) string {
	if math.IsNaN(v) {
		return ""
	}
	if math.IsInf(v, 0) {
		return "is not finite"
	}
	switch c.Kind {
	case KindPositive:
		if !(v > 0) {
			return "is not > 0 (a positive column)"
		}
	case KindCount:
		if v < 0 || v != math.Floor(v) {
			return "is not a count 0, 1, 2, ..."
		}
	case KindBinary:
		if v != 0 && v != 1 {
			return "is not 0 or 1 (a binary column)"
		}
	case KindCategorical:
		if v < 0 || v != math.Floor(v) || v >= float64(len(c.Categories)) {
			return fmt.Sprintf("is not a category index 0..%d", len(c.Categories)-1)
		}
	}
	return ""
}

// CheckSchema checks that s has one feature per schema column and that
// every value fits its column's kind (missing entries, NaN, are allowed
// only when s allows missing values). The error names the record and the
// column and wraps ErrInvalidData.
func (s *Set) CheckSchema(sc Schema) error {
	const where = "dataset.Set.CheckSchema"
	if s == nil {
		return argError(where, "s", "nil Set")
	}
	if err := sc.Validate(); err != nil {
		return fmt.Errorf("%s: %w", where, err)
	}
	if len(sc.Columns) != s.f {
		return argError(where, "schema", "%d columns, the set has %d features", len(sc.Columns), s.f)
	}
	for i := 0; i < s.n; i++ {
		for j, c := range sc.Columns {
			v := s.x[i*s.f+j]
			if msg := c.checkValue(v); msg != "" {
				return dataError(where, "record %d, column %d (%q): value %v %s", i, j, c.Name, v, msg)
			}
		}
	}
	return nil
}

// CategoryIndex returns the index of value among the categories of column
// c, or -1.
func (c SchemaColumn) CategoryIndex(value string) int {
	return slices.Index(c.Categories, value)
}
