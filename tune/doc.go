// Package tune answers "what would the recorded history have looked like
// with other alarm settings?": it sweeps a grid of alarm profiles over
// recorded trends with the alarm engine the gateway runs (package alarms,
// not a copy), scores each profile against reference events, and writes a
// summary CSV, a frontier chart and a self-contained HTML report.
//
// Nouns: Grid (the tuning grid file: a base profile, swept keys, the
// reference), Reference (real events, from a rule or an annotated file),
// Result (one Row of metrics per grid point, in grid order).
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
//	  grace: 60s                     # optional, default 60s
//	  conditions: [spo2_low]         # optional: the conditions scored; default every spo2_low condition
//
// Grid points are numbered in cross-product order with the last key
// varying fastest. Each point's profile is the base with each swept value
// set through alarms.Profile.Set and validated by the profile rules; errors
// name the key path and the bound (sweep.spo2_low.delay[2]: -5s, want >= 0).
// Averaging times (re-running the estimator over raw captures) are not
// supported yet: the key is rejected with an error saying so.
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
// It is a research tool, not a certified medical device: alarm settings are
// the clinical team's decision.
package tune
