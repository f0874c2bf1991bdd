package fleet

import (
	"errors"
	"math"
	"strings"
	"testing"
	"time"
)

// TestToSet checks that every row of the set is the record's readings in
// sensor order and every label its station type, by comparing with the
// records one value at a time.
func TestToSet(t *testing.T) {
	f := smallFleet(t, 2)
	s, err := ToSet(f.Test)
	if err != nil {
		t.Fatal(err)
	}
	if s.Len() != len(f.Test) || s.Features() != NumSensors || s.Classes() != len(StationTypes()) {
		t.Fatalf("set of %d x %d with %d classes, want %d x %d with %d", s.Len(), s.Features(), s.Classes(),
			len(f.Test), NumSensors, len(StationTypes()))
	}
	for i, r := range f.Test {
		row := s.Row(i)
		for j := range NumSensors {
			if row[j] != r.Values[j] {
				t.Fatalf("record %d, %s: set %v, record %v", i, SensorNames()[j], row[j], r.Values[j])
			}
		}
		if s.Label(i) != r.Type {
			t.Fatalf("record %d: label %d, station type %d", i, s.Label(i), r.Type)
		}
	}
}

func TestToSetErrors(t *testing.T) {
	f := smallFleet(t, 2)
	bad := append([]Record(nil), f.Test[:3]...)
	bad[1].Values[Power] = math.NaN()
	if _, err := ToSet(bad); err == nil {
		t.Error("NaN reading: want an error")
	}
	bad = append([]Record(nil), f.Test[:3]...)
	bad[2].Type = len(StationTypes())
	if _, err := ToSet(bad); err == nil {
		t.Error("station type out of range: want an error")
	}
	// The error of the Set underneath is wrapped, not replaced.
	bad[2].Type = -1
	if _, err := ToSet(bad); err == nil || errors.Unwrap(err) == nil {
		t.Errorf("negative station type: err = %v, want a wrapped error", err)
	}
}

func TestSplitAt(t *testing.T) {
	t0 := Start()
	recs := []Record{{Time: t0}, {Time: t0.Add(2 * time.Hour)}, {Time: t0.Add(time.Hour)}, {Time: t0.Add(3 * time.Hour)}}
	before, after := SplitAt(recs, t0.Add(2*time.Hour))
	if len(before) != 2 || !before[0].Time.Equal(t0) || !before[1].Time.Equal(t0.Add(time.Hour)) {
		t.Errorf("before: %v", before)
	}
	if len(after) != 2 || !after[0].Time.Equal(t0.Add(2*time.Hour)) || !after[1].Time.Equal(t0.Add(3*time.Hour)) {
		t.Errorf("after (the split time itself belongs here): %v", after)
	}
}

func TestSetsSplitInTime(t *testing.T) {
	f, err := GenerateFleet(FleetConfig{Stations: 2, HistoryDays: 3, TestDays: 1, Seed: 4})
	if err != nil {
		t.Fatal(err)
	}
	valFrom := Start().AddDate(0, 0, 2)
	train, val, test, err := f.Sets(valFrom)
	if err != nil {
		t.Fatal(err)
	}
	before, after := SplitAt(f.History, valFrom)
	if train.Len() != len(before) || val.Len() != len(after) || test.Len() != len(f.Test) {
		t.Fatalf("sizes %d/%d/%d, want %d/%d/%d", train.Len(), val.Len(), test.Len(), len(before), len(after), len(f.Test))
	}
	if train.Len()+val.Len() != len(f.History) || train.Len() == 0 || val.Len() == 0 {
		t.Errorf("history of %d records split into %d and %d", len(f.History), train.Len(), val.Len())
	}
	for i, r := range after {
		row := val.Row(i)
		for j, v := range r.Values {
			if row[j] != v {
				t.Fatalf("validation record %d, sensor %d: %v, want %v", i, j, row[j], v)
			}
		}
	}
}

func TestCheckFlags(t *testing.T) {
	if err := CheckFlags(3, 5, 1, 2); err != nil {
		t.Errorf("valid flags: %v", err)
	}
	for _, c := range []struct {
		stations, days, val, test int
		flag                      string
	}{
		{0, 5, 1, 2, "-stations"},
		{3, 5, 0, 2, "-val-days"},
		{3, 5, 5, 2, "-val-days"},
		{3, 5, 1, 0, "-test-days"},
	} {
		err := CheckFlags(c.stations, c.days, c.val, c.test)
		if err == nil || !strings.Contains(err.Error(), c.flag) {
			t.Errorf("CheckFlags(%d, %d, %d, %d) = %v, want an error naming %s", c.stations, c.days, c.val, c.test, err, c.flag)
		}
	}
}

// TestMixedSet checks the dropouts, the operating mode and the starts: the
// dropped fraction is near FleetConfig.Missing, a dropped reading is
// missing in the mixed set and every other value is the record's.
func TestMixedSet(t *testing.T) {
	f, err := GenerateFleet(FleetConfig{Stations: 3, HistoryDays: 4, TestDays: 2, Interval: 30 * time.Minute, Seed: 3, Missing: 0.2})
	if err != nil {
		t.Fatal(err)
	}
	s, err := ToMixedSet(f.History)
	if err != nil {
		t.Fatal(err)
	}
	if s.Features() != NumColumns || s.Len() != len(f.History) {
		t.Fatalf("set %d x %d", s.Len(), s.Features())
	}
	dropped := 0
	for i, r := range f.History {
		row := s.Row(i)
		for j := range NumSensors {
			if r.Dropped[j] {
				dropped++
				if !math.IsNaN(row[j]) {
					t.Fatalf("record %d sensor %d dropped but %v", i, j, row[j])
				}
			} else if row[j] != r.Values[j] {
				t.Fatalf("record %d sensor %d: %v, want %v", i, j, row[j], r.Values[j])
			}
		}
		if row[ModeColumn] != float64(r.Mode) || row[StartsColumn] != float64(r.Starts) {
			t.Fatalf("record %d: mode %v starts %v, want %d %d", i, row[ModeColumn], row[StartsColumn], r.Mode, r.Starts)
		}
	}
	frac := float64(dropped) / float64(len(f.History)*NumSensors)
	// 36 sensor series of 192 records in bursts of 3: the fraction's
	// standard deviation is a few percent; 0.08 is a loose bound.
	if math.Abs(frac-0.2) > 0.08 {
		t.Errorf("dropped fraction %v, want about 0.2", frac)
	}
	if s.Missing() != dropped {
		t.Errorf("Missing %d, dropped %d", s.Missing(), dropped)
	}
	// Without dropouts the readings equal those of a fleet generated with
	// them: dropouts only hide readings.
	g, err := GenerateFleet(FleetConfig{Stations: 3, HistoryDays: 4, TestDays: 2, Interval: 30 * time.Minute, Seed: 3})
	if err != nil {
		t.Fatal(err)
	}
	for i := range g.Test {
		if g.Test[i].Values != f.Test[i].Values || g.Test[i].Mode != f.Test[i].Mode {
			t.Fatalf("test record %d differs between Missing 0 and 0.2", i)
		}
	}
}
