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
// likelihood with one learned sigma per sensor) on the normal history and
// scores a later test period (two weeks by default) into which three kinds
// of fault are injected: bearing wear (vibration and bearing temperature
// drift up over days), cavitation (suction pressure and flow dip at peak
// demand with vibration bursts) and a sensor stuck at a constant. The score
// of a record is the importance-weighted estimate of -log p(x) under the
// model.
//
// The history ends with two held-out stretches: validation days, which
// pick the best epoch, and calibration days, which neither train nor choose
// the model. Package lowerbound.dev/vae/alarm turns the calibration scores
// into an alarm threshold with a stated false-alarm rate (-alpha, split
// conformal: a normal record like the calibration records alarms with
// probability at most alpha) and conformal p-values. The program reports,
// per fault type, precision, recall and ROC AUC
//
//   - at the alarm threshold, and
//   - under batch screening: each day of the fleet (-screen) is screened
//     with Benjamini-Hochberg on the conformal p-values at a target false
//     discovery rate (-fdr);
//
// the false-alarm rate observed on the normal test records with its
// Clopper-Pearson interval; and a drift check of each test week
// (-drift-days): the Kolmogorov-Smirnov distance between the normal
// records' scores and the calibration scores, and the week's false-alarm
// rate with its interval. Records ten minutes apart are correlated, so the
// KS p-values and the intervals, which assume independence, look more
// precise than they are.
//
// The feature standardisation and the alarm calibration are stored in the
// checkpoint's metadata (the calibration under alarm.MetadataKey); the test
// period is scored, alarmed and screened by a model read back from that
// file, as a separate scoring service would.
//
// The scores are a screening aid, not a protection system: alarms, trips
// and inspections follow the site's own procedures, local codes and
// qualified staff.
//
// Outputs, in -out (default out/telemetry): scores.png, roc.png,
// model.safetensors and scores.csv.
//
//	go run ./examples/telemetry
//	go run ./examples/telemetry -h
package main
