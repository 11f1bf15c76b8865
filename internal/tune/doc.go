// Package tune answers "what would the recorded history have looked like
// with other alarm settings?": it sweeps a grid of alarm profiles over
// recorded trends with the alarm engine the gateway runs (package alarms,
// not a copy), scores each profile against reference events, and writes a
// summary CSV, a frontier chart and a self-contained HTML report.
//
// Nouns: Grid (the tuning grid file: a base profile, swept keys, the
// reference, optional averaging times), Reference (real events, from a rule,
// an annotated file or the operators' reviews of stored episodes), Estimated (trends re-estimated from raw captures,
// one set per averaging time), Result (one Row of metrics per grid point,
// in grid order).
//
// # Grid file (CONTRACT keys: base, sweep, reference)
//
//	base: adult-ward-pilot.yaml      # profile file relative to the grid file, or an inline profile
//	sweep:                           # CONDITION.KEY -> values; the grid is their cross product
//	  spo2_low.limit: [86, 88, 90]
//	  spo2_low.delay: [0s, 10s, 15s, 30s]
//	  spo2_low.escalate.below: [80, 85]
//	reference:
//	  rule: {below: 85, for: 60s}    # or: file: events.csv (device,start_s,end_s,label)
//	                                 # or: reviews: {positive: [actionable], negative: [not-actionable, artefact]}
//	  grace: 60s                     # optional, default 60s
//	  conditions: [spo2_low]         # optional: the conditions scored; default every spo2_low condition
//	averaging: [4s, 8s, 12s]         # optional: estimator averaging times (needs raw captures)
//
// Grid points are numbered in cross-product order with the last key
// varying fastest. Each point's profile is the base with each swept value
// set through alarms.Profile.Set and validated by the profile rules; errors
// name the key path and the bound (sweep.spo2_low.delay[2]: -5s, want >= 0).
//
// # Averaging times
//
// The top-level key averaging lists estimator averaging windows (Go
// durations, estimator.MinAveragingS..MaxAveragingS = 2s..30s, none twice;
// errors read averaging[1] (line 4): "45s", want a duration in [2s, 30s]).
// It is a grid dimension like a swept key: the first after profile in
// summary.csv (column "averaging", values as written) and the slowest to
// vary; sweep may then be left out. Writing it under sweep (e.g.
// estimator.averaging) is an error that points here.
//
// A trend holds estimates already, so averaging times need the raw samples:
// EstimateStore reads the raw captures the gateway kept (serve
// --capture-raw) and re-runs the estimator once per averaging time through
// estimator.Timeline, exactly as the gateway does live: each device's ADC
// bits and its recorded calibration ("empirical", "beer-lambert" or
// "beer-lambert@RED/IRnm", or a curve kept in the store, "name@vN"; one
// that cannot be resolved is an error naming the device), a restart on a
// rate change, a device-clock jump over 1 s or a skipped sequence number
// (a lost chunk), and each point at the end of its second on the device
// clock. Devices without raw captures in range are left out and listed
// (Estimated.Skipped); naming one with Filter.Devices is an error. Run with
// trends and a grid with averaging times is an error (nothing to
// re-estimate); RunEstimated sweeps each grid point over the trends of its
// averaging time. The estimator's seconds do not depend on the window, so
// every set has the same sample times and monitored time. The reference
// rule's events are found once, on the trends of the shortest averaging
// time (closest to the physiology), and score every row alike; a longer
// window would otherwise erase the very events it misses. WriteOutputs also
// writes each set as trends/averaging-T.csv, so replay over it reproduces
// any row.
//
// At the gateway's averaging time (8 s) the re-estimated trends equal the
// stored live ones point for point (cmd/pulsefleet
// TestTuneReestimationMatchesLiveGateway), except after a reconnect: the
// gateway also restarts the estimator with every new stream, and the store
// does not record which stream a capture came from, so a reconnect with a
// continuous clock and sequence is bridged here; the live trend lacks
// values for the warm-up (about 3 s) after it and its seconds are counted
// from the reconnect.
//
// Caveat, seen in the tests: a longer window smooths a dip shorter than it
// (shallower, so fewer threshold alarms with no delay) but also spreads it
// in time, so a condition with a delay (desaturation, 10 s) can fire at a
// long window and not at a short one.
//
// # Metrics
//
// Monitored time is the time between consecutive samples of a device, gaps
// longer than Options.MaxGap excluded (a device that was off is not
// monitored). Episodes are counted exactly as `pulsefleet replay` counts
// them (every announced episode of every condition). An episode is "in
// alarm" from its announcement to its end (or the device's last sample if it
// had not ended); time in alarm is the union of these spans within
// monitored time. By priority, an episode counts at its base priority until
// it escalates and at the escalated priority after; its count goes to the
// highest priority it reached (as in replay).
//
// # Matching rule (reference events against alarms)
//
// Only the scored conditions' episodes take part. With grace G:
//   - an event [start, end) of a device is detected when an episode of the
//     same device is in alarm at some time in [start, end+G]: announced at or
//     before end+G and not ended before start. Its detection delay is
//     max(0, first such announcement - start): an alarm already sounding
//     when the event starts detects it with zero delay;
//   - an episode is a true positive when its alarm span [announced, ended]
//     meets [start, end+G] of some event of the same device;
//   - sensitivity = detected events / events; positive predictive value =
//     true-positive episodes / scored episodes (empty when undefined).
//
// Reference reviews: the events are the reviewed-positive episodes (onset to
// end), matched by the same rule; reviews.go says what else is counted
// (negatives avoided, unreviewed alarms) and why PPV is left undefined.
//
// Reference rule {below: B, for: D}: an event starts at the first valid
// sample with SpO2 < B and ends at the next valid sample with SpO2 >= B (or
// at the device's last sample); missing values change nothing; it counts
// when end - start >= D.
//
// # Speed
//
// Conditions of a profile do not interact in the engine, so a grid point's
// episodes are the union of its conditions' episodes. The sweep runs each
// distinct condition variant once as a one-condition profile through
// alarms.Engine (Reset, Eval per sample, the open episodes at the end: what
// Engine.Run does), on a worker pool of runtime.GOMAXPROCS(0) goroutines
// partitioned by device and block of variants, and assembles each grid
// point from its variants; results land in grid order whatever the
// scheduling. Within a job, every variant of the block evaluates one chunk
// of 1,024 samples before the next chunk is read, so the samples stay in
// the core's cache (2.9x faster than each variant streaming the whole
// trend). TestTuneAgreesWithReplay checks every grid point against
// alarms.ReplayTrends of the full profile.
//
// Most conditions need not run the engine at all. For a threshold
// condition (every kind but desaturation) the intervals during which it is
// present depend only on its limit and hysteresis (alarms.Threshold), and
// its announcement and escalation times follow from the sample times and
// values inside each interval: the sweep finds the intervals once per
// threshold and device and derives every delay, escalation and latching
// variant sharing it from them (alarms.ThresholdRule.Episode; a binary
// search per interval). Desaturation (its baseline moves) and trends whose
// times do not strictly increase take the engine.
// TestIntervalSweepAgreesOnRandomGrids and
// TestIntervalSweepAgreesOnHandWorkedGrids check that both ways give
// identical episodes and summaries. With 100 profiles over 1,000
// device-hours this cut the sweep's CPU time 7.6x (BenchmarkTune,
// cpu-ns/sample/profile 14.4 before, 1.9 after, on a loaded 2-core machine).
//
// It is a research tool, not a certified medical device: alarm settings are
// the clinical team's decision.
package tune
