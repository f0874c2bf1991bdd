// Package fleet generates the invented pump-station telemetry of the example
// programs. The data is invented: there is no real fleet, site, station or
// sensor behind it, only a simulation written for the demos. Do not read
// engineering conclusions into its numbers.
//
// GenerateFleet simulates a fleet of pumping stations of three types
// (StationTypes: booster, district, transfer). Every station reads
// NumSensors = 12 sensors at a fixed interval (ten minutes by default):
// flow, suction and discharge pressure, drive-end and non-drive-end bearing
// temperature, motor winding temperature, vibration velocity on three axes,
// motor current, power and speed. The constants Flow ... Speed index
// Record.Values and SensorNames gives the column names. The simulation has a
// daily demand cycle, the pump affinity laws, lagged temperatures and
// correlated noise.
//
// The result holds a normal history and, after it, a test period into which
// one fault per station (or none) is injected and labelled per record:
// BearingWear (vibration and bearing temperature drift up over days),
// Cavitation (suction pressure and flow dip at peak demand, with vibration
// bursts) and StuckSensor (one sensor repeats a constant). Faults lists the
// fault labels, Normal excluded; Fleet.Events describes each injected fault
// and Fleet.TestClean holds the test period before injection.
//
//	f, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: 12, HistoryDays: 28, TestDays: 7, Seed: 1})
//	for _, r := range f.Test {
//		_ = r.Values[fleet.VibrationX] // r.Fault is the label, r.Type the station type
//	}
//	test, err := fleet.ToSet(f.Test)
//
// ToSet turns records into a dataset.Set (raw sensor readings, labelled by
// station type) for the SDK's models; standardise it before training.
//
// Every record also has an operating mode (Record.Mode, an index into
// Modes(): the drive's speed band) and a count of starts and stops
// (Record.Starts); with FleetConfig.Missing > 0 sensors drop out in bursts
// (Record.Dropped; Values keeps the true reading). ToMixedSet gives the
// mixed records of MixedSchema (sensors real, NaN where dropped out; mode
// categorical; starts a count). Mode, starts and dropouts come from
// generators of their own, so the readings do not depend on them.
//
// The same FleetConfig always gives the same records: every random draw
// comes from PCG generators seeded with FleetConfig.Seed. The first record
// of every station is at Start(), so the history's day d begins at
// Start().AddDate(0, 0, d).
package fleet
