// Command telemetry flags unusual pump-station telemetry with a variational
// autoencoder trained on normal operation.
//
// The data is invented for this demo: package
// lowerbound.dev/examples/internal/fleet simulates a fleet of
// pumping stations of three types (booster, district, transfer), each
// reading twelve sensors every ten minutes (flow, suction and discharge
// pressure, drive-end and non-drive-end bearing temperature, motor winding
// temperature, vibration velocity on three axes, motor current, power and
// speed) with a daily demand cycle, pump affinity laws, lagged temperatures
// and correlated noise. No real plant is behind any of it.
//
// The program trains a VAE (conditioned on the station type, Gaussian
// likelihood with one learned sigma per sensor) on the normal history,
// sets an alarm threshold at a quantile of the scores of held-out normal
// days, and scores a later test period into which three kinds of fault are
// injected: bearing wear (vibration and bearing temperature drift up over
// days), cavitation (suction pressure and flow dip at peak demand with
// vibration bursts) and a sensor stuck at a constant. It reports precision,
// recall and ROC AUC per fault type. The score of a record is the
// importance-weighted estimate of -log p(x) under the model.
//
// The feature standardisation and the threshold are stored in the
// checkpoint's metadata; the test period is scored by a model read back
// from that file, as a separate scoring service would.
//
// The scores are a screening aid, not a protection system: alarms, trips
// and inspections follow the site's own procedures and qualified staff.
//
// Outputs, in -out (default out/telemetry): scores.png, roc.png,
// model.safetensors and scores.csv.
//
//	go run ./examples/telemetry
//	go run ./examples/telemetry -h
package main
