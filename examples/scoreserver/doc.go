// Command scoreserver is an HTTP scoring service for a checkpoint such as
// the telemetry example's. POST /score takes one record or many in JSON
// and answers with their anomaly scores, the conformal p-values and alarm
// flags of the checkpoint's calibration and, on request, each column's
// part of the score; GET /healthz describes the checkpoint served; GET
// /metrics has request counts, latencies, scores, flags and errors by kind
// in the Prometheus text format; POST /reload (or SIGHUP) reads the
// checkpoint file again and swaps it in without dropping requests,
// keeping the old model when the new file does not load. SIGINT or
// SIGTERM shuts it down gracefully, finishing the requests in flight.
//
// # What it reads from the checkpoint
//
// The server is generic over checkpoints; from the metadata it reads
//
//   - the schema (vae.Model.Schema): column names, kinds and the
//     categories of categorical columns;
//   - the standardizer (vae.Model.Standardizer): a record's raw values
//     are standardised before scoring;
//   - the alarm calibration (vae/alarm.Get): the threshold, flags and
//     p-values;
//   - the class names of a conditional model ("labels", a JSON list, or
//     the telemetry example's "telemetry.station_types");
//   - the K and seed the calibration scores were computed with
//     ("score.k", "score.seed"; "score.mean" = "true" for scores at the
//     posterior mean).
//
// It scores with the checkpoint's K by default and refuses a -k (or
// -mean) that conflicts with a calibrated checkpoint's: a threshold
// calibrated at one K is not valid at another. -seed may differ (it
// changes a record's noise, not the distribution of its score). A reload
// resolves the settings again for the new file: one that conflicts with
// an explicit -k fails, and the old model keeps serving.
// Checkpoints without a schema get columns named after the likelihood's
// (or feature_0, feature_1, ...); checkpoints of the first telemetry
// example (all-real sensors, "telemetry.features" and
// "telemetry.standardizer") still load.
//
// # Requests
//
// A record's "values" are its raw values, either as an object keyed by
// column name or as an array in column order:
//
//	{"values":[535,0.50,3.64,37.4,31.4,44.0,2.00,1.80,1.19,177,62.4,903,"normal",0],"label":"transfer"}
//	{"values":{"flow_m3h":535,"suction_bar":0.50,"vib_x_mms":null,"mode":"normal"},"label":"transfer","key":7}
//	{"records":[{"values":...,"label":...}, ...], "columns":true}
//
// (The first is a normal record of a transfer station of the invented
// fleet: against the telemetry example's checkpoint it scores well below
// the threshold; with vib_x_mms at 9.5 it is flagged, and "columns" puts
// almost all of its score on vib_x_mms.)
//
// A value is a number, a category's name (or its index) for a categorical
// column, or null. Null, and in the object form an absent column, is a
// missing value: accepted when the model's likelihood is a losses.Columns
// (which scores the observed values only; "observed" in the answer counts
// them, and records with fewer observed values tend to score lower), a
// 400 naming the column otherwise. "label" is the class of a conditional
// model, by name or index; "key" an optional noise key (a reading's id,
// say) that makes a record's score the same in every request; "columns"
// asks for each column's part of the reconstruction term, by column name.
// Bad requests get a 4xx answer {"error": ..., "kind": ...} naming the
// record, the column and the problem: malformed JSON, a wrong value count,
// an unknown column, an unknown category (listing the allowed ones), a
// value of the wrong kind, an out-of-range number, an unknown label, a
// body or batch too large.
//
// # The demo model
//
// Without -model it first trains, in about a second, a small model of the
// telemetry example's kind (mixed columns: 12 sensors, an operating mode,
// a start count, with dropped-out readings; conditional on the station
// type) on an invented fleet, calibrates it at K = 16 and serves it, so
//
//	go run ./examples/scoreserver
//
// works from a clean checkout. Then, for example:
//
//	curl -s localhost:8080/score -d '{"values":{"flow_m3h":120,"suction_bar":2.2,"vib_x_mms":null,"mode":"normal","starts":0},"label":"booster","columns":true}'
//	curl -s localhost:8080/healthz
//	go run ./examples/scoreserver/loadtest -n 20000 -c 8
//
// With the telemetry example's checkpoint:
//
//	go run ./examples/telemetry -out out/telemetry
//	go run ./examples/scoreserver -model out/telemetry/model.safetensors
//
// The data is invented; the scores are a screening aid, not a protection
// system.
package main
