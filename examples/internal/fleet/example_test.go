package fleet_test

import (
	"fmt"
	"slices"

	"lowerbound.dev/examples/internal/fleet"
)

// Four stations are dealt the three fault kinds and one "none", so three
// faults are injected; at the default ten-minute interval a day has 144
// records per station.
func ExampleGenerateFleet() {
	f, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: 4, HistoryDays: 2, TestDays: 3, Seed: 1})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("stations %d, history %d records, test %d records\n", len(f.Stations), len(f.History), len(f.Test))
	fmt.Println("first record", f.History[0].Time, "with", len(f.History[0].Values), "sensors, label", f.History[0].Fault)
	var kinds []string
	for _, ev := range f.Events {
		kinds = append(kinds, ev.Fault.String())
	}
	slices.Sort(kinds)
	fmt.Println("faults injected:", kinds)
	// Output:
	// stations 4, history 1152 records, test 1728 records
	// first record 2025-03-03 00:00:00 +0000 UTC with 12 sensors, label normal
	// faults injected: [bearing_wear cavitation stuck_sensor]
}
