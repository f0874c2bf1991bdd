package schedule

import (
	"bytes"
	"encoding/json"
	"fmt"
)

// Kinds of the built-in schedules, as stored in Spec.Kind.
const (
	KindConstant     = "constant"
	KindLinearWarmup = "linear-warmup"
	KindCyclical     = "cyclical"
)

// Spec describes a built-in Beta so that it can be stored (in checkpoint
// metadata, as JSON) and rebuilt: Kind is one of the Kind constants and
// Config holds the schedule's fields as a JSON object, with the field names
// of the struct's JSON tags, e.g.
//
//	{"kind":"linear-warmup","config":{"start":0,"end":1,"steps":10000}}
type Spec struct {
	Kind   string          `json:"kind"`
	Config json.RawMessage `json:"config"`
}

// Describe returns the Spec of a built-in schedule (Constant, LinearWarmup
// or Cyclical, by value or pointer). The schedule is validated first. Other
// types are an error: a user schedule must be stored by its own code.
func Describe(b Beta) (Spec, error) {
	const where = "schedule.Describe"
	var kind string
	var v interface{ Validate() error }
	switch s := b.(type) {
	case Constant:
		kind, v = KindConstant, s
	case *Constant:
		if s != nil {
			kind, v = KindConstant, *s
		}
	case LinearWarmup:
		kind, v = KindLinearWarmup, s
	case *LinearWarmup:
		if s != nil {
			kind, v = KindLinearWarmup, *s
		}
	case Cyclical:
		kind, v = KindCyclical, s
	case *Cyclical:
		if s != nil {
			kind, v = KindCyclical, *s
		}
	default:
		return Spec{}, argError(where, "b", "not a built-in schedule: %T", b)
	}
	if v == nil {
		return Spec{}, argError(where, "b", "nil %T", b)
	}
	if err := v.Validate(); err != nil {
		return Spec{}, fmt.Errorf("%s: %w", where, err)
	}
	cfg, err := json.Marshal(v)
	if err != nil {
		return Spec{}, fmt.Errorf("%s: %w", where, err)
	}
	return Spec{Kind: kind, Config: cfg}, nil
}

// FromSpec rebuilds the schedule a Spec describes and validates it. The
// Config must be a JSON object with only the fields of that kind; a missing
// field takes its zero value (which may then fail validation). The result is
// a value (Constant, LinearWarmup or Cyclical), not a pointer.
func FromSpec(s Spec) (Beta, error) {
	const where = "schedule.FromSpec"
	var (
		b   Beta
		err error
	)
	switch s.Kind {
	case KindConstant:
		var c Constant
		err = decodeConfig(s.Config, &c)
		b = c
	case KindLinearWarmup:
		var l LinearWarmup
		err = decodeConfig(s.Config, &l)
		b = l
	case KindCyclical:
		var c Cyclical
		err = decodeConfig(s.Config, &c)
		b = c
	default:
		return nil, argError(where, "Kind", "unknown schedule kind %q", s.Kind)
	}
	if err != nil {
		return nil, argError(where, "Config", "kind %q: %v", s.Kind, err)
	}
	if err := b.(interface{ Validate() error }).Validate(); err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return b, nil
}

// decodeConfig decodes one JSON object into v, rejecting unknown fields and
// anything after the object.
func decodeConfig(raw json.RawMessage, v any) error {
	if len(bytes.TrimSpace(raw)) == 0 {
		return fmt.Errorf("empty config")
	}
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return err
	}
	if dec.More() {
		return fmt.Errorf("data after the config object")
	}
	return nil
}
