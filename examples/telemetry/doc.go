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
// and correlated noise, plus an operating mode (a category: the drive's
// speed band) and a count of starts and stops. With -missing p, readings
// drop out in bursts (a transmitter losing contact), p of them in the long
// run. No real plant is behind any of it.
//
// The program trains a VAE over these mixed records (Nazabal et al. 2020:
// conditioned on the station type; Gaussian sensors with one learned sigma
// each, a categorical mode, a Poisson start count; dropped-out readings
// are skipped by the likelihood and masked for the encoder) on the normal
// history and
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
// For each injected fault the report names the inputs that drive its
// alarms: the columns whose contribution to the reconstruction term
// (vae.Model.ScoreColumns) over the event's alarmed records most exceeds
// their mean over the normal records. It also compares imputation of
// readings hidden completely at random (10%, 30%, 50% of the clean test
// records) by the model's conditional mean (vae.Model.Impute) with
// per-column mean imputation (-no-impute skips it).
//
// The same screening runs on a user's own files: -train FILE (a normal
// period; in file order the first 70% train, the next 10% pick the epoch,
// the last 20% calibrate the threshold) and -score FILE, with -schema FILE
// (JSON, see dataset.Schema) naming each column's kind, or every column
// real without it. Empty cells, NaN and NA are missing readings. The
// schema and the standardisation are stored in the checkpoint and the
// scored file is read with them; scores.csv lists each record's score,
// p-value, alarm and top inputs.
//
// The scores are a screening aid, not a protection system: alarms, trips
// and inspections follow the site's own procedures, local codes and
// qualified staff.
//
// Outputs, in -out (default out/telemetry): scores.png, roc.png,
// model.safetensors and scores.csv.
//
//	go run ./examples/telemetry
//	go run ./examples/telemetry -missing 0.2
//	go run ./examples/telemetry -train normal.csv -score week.csv -schema schema.json
//	go run ./examples/telemetry -h
package main
