package fleet

import (
	"fmt"
	"math"
	"time"

	"lowerbound.dev/vae/dataset"
)

// ToSet turns records into a dataset.Set of len(recs) rows and NumSensors
// features (Record.Values in sensor order, raw units), labelled by station
// type (Record.Type) with len(StationTypes()) classes, ready to be
// standardised and fed to a conditional model. The fault labels are not
// carried over; read them from the records. A non-finite reading or a
// station type out of range is an error.
func ToSet(recs []Record) (*dataset.Set, error) {
	x := make([]float64, 0, len(recs)*NumSensors)
	labels := make([]int, len(recs))
	for i, r := range recs {
		x = append(x, r.Values[:]...)
		labels[i] = r.Type
	}
	s, err := dataset.New(x, len(recs), NumSensors)
	if err != nil {
		return nil, fmt.Errorf("ToSet: %w", err)
	}
	s, err = s.WithLabels(labels, len(StationTypes()))
	if err != nil {
		return nil, fmt.Errorf("ToSet: %w", err)
	}
	return s, nil
}

// Column indices of a mixed set (ToMixedSet) after the sensors.
const (
	ModeColumn   = NumSensors     // operating mode, categorical
	StartsColumn = NumSensors + 1 // starts and stops, count
	NumColumns   = NumSensors + 2
)

// MixedSchema returns the schema of ToMixedSet's records: the sensors as
// real columns, the operating mode as a categorical column and the starts
// as a count.
func MixedSchema() dataset.Schema {
	var sc dataset.Schema
	for _, n := range SensorNames() {
		sc.Columns = append(sc.Columns, dataset.SchemaColumn{Name: n, Kind: dataset.KindReal})
	}
	sc.Columns = append(sc.Columns,
		dataset.SchemaColumn{Name: "mode", Kind: dataset.KindCategorical, Categories: Modes()},
		dataset.SchemaColumn{Name: "starts", Kind: dataset.KindCount})
	return sc
}

// ToMixedSet is ToSet for the mixed records of MixedSchema: the sensor
// readings (NaN where dropped out, a missing entry), the operating mode
// index and the start count, labelled by station type.
func ToMixedSet(recs []Record) (*dataset.Set, error) {
	x := make([]float64, 0, len(recs)*NumColumns)
	labels := make([]int, len(recs))
	for i, r := range recs {
		for s, v := range r.Values {
			if r.Dropped[s] {
				v = math.NaN()
			}
			x = append(x, v)
		}
		x = append(x, float64(r.Mode), float64(r.Starts))
		labels[i] = r.Type
	}
	s, err := dataset.NewMissing(x, len(recs), NumColumns)
	if err != nil {
		return nil, fmt.Errorf("ToMixedSet: %w", err)
	}
	if s, err = s.WithLabels(labels, len(StationTypes())); err != nil {
		return nil, fmt.Errorf("ToMixedSet: %w", err)
	}
	if err := s.CheckSchema(MixedSchema()); err != nil {
		return nil, fmt.Errorf("ToMixedSet: %w", err)
	}
	return s, nil
}

// MixedSets is Sets with ToMixedSet.
func (f *Fleet) MixedSets(valFrom time.Time) (train, val, test *dataset.Set, err error) {
	trainRecs, valRecs := SplitAt(f.History, valFrom)
	if train, err = ToMixedSet(trainRecs); err != nil {
		return nil, nil, nil, fmt.Errorf("training records: %w", err)
	}
	if val, err = ToMixedSet(valRecs); err != nil {
		return nil, nil, nil, fmt.Errorf("validation records: %w", err)
	}
	if test, err = ToMixedSet(f.Test); err != nil {
		return nil, nil, nil, fmt.Errorf("test records: %w", err)
	}
	return train, val, test, nil
}

// SplitAt splits records by time: those before t, and those at or after t,
// each in their original order.
func SplitAt(recs []Record, t time.Time) (before, after []Record) {
	for _, r := range recs {
		if r.Time.Before(t) {
			before = append(before, r)
		} else {
			after = append(after, r)
		}
	}
	return before, after
}

// Sets returns the fleet's records as data sets in raw units: the history
// before valFrom for training, the rest of the history for validation, and
// the test period (see ToSet).
func (f *Fleet) Sets(valFrom time.Time) (train, val, test *dataset.Set, err error) {
	trainRecs, valRecs := SplitAt(f.History, valFrom)
	if train, err = ToSet(trainRecs); err != nil {
		return nil, nil, nil, fmt.Errorf("training records: %w", err)
	}
	if val, err = ToSet(valRecs); err != nil {
		return nil, nil, nil, fmt.Errorf("validation records: %w", err)
	}
	if test, err = ToSet(f.Test); err != nil {
		return nil, nil, nil, fmt.Errorf("test records: %w", err)
	}
	return train, val, test, nil
}

// CheckFlags validates the fleet flags the examples share (-stations,
// -days, -val-days, -test-days) and names the flag at fault.
func CheckFlags(stations, days, valDays, testDays int) error {
	switch {
	case stations < 1:
		return fmt.Errorf("-stations %d: want >= 1", stations)
	case valDays < 1 || days <= valDays:
		return fmt.Errorf("-days %d, -val-days %d: want 1 <= val-days < days", days, valDays)
	case testDays < 1:
		return fmt.Errorf("-test-days %d: want >= 1", testDays)
	}
	return nil
}
