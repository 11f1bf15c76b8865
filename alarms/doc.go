// Package alarms is pulsefleet's alarm engine: alarm profiles, the
// per-stream state machine, the episode log, desaturation indices (ODI,
// T90) and replay of recorded trends. It is pure and deterministic: time
// comes from the samples (float64 seconds), never from the wall clock, and it
// does no I/O beyond the readers and writers it is handed.
//
// Vocabulary follows IEC 60601-1-8: an alarm condition is present when a
// value is beyond its alarm limit; the alarm condition delay is how long it
// must stay present before the alarm condition exists (is announced);
// priorities mean high = immediate response, medium = prompt response, low =
// awareness; a latching alarm signal continues after its condition ends
// until an operator acknowledges it.
//
// One Engine serves one stream. States per condition are inactive, pending
// (present, delay running), active (announced) and, for latching conditions,
// latched after the condition cleared. Acknowledgement and pause sit beside
// evaluation: a pause marks events as Paused (not to be announced to people)
// but never stops evaluation or logging. Snapshot and Restore carry the state
// across restarts without losing or re-announcing an episode.
//
// Semantics worth knowing (see the profile contract in Profile):
//   - a threshold condition is present at the first sample beyond the limit
//     (strictly: SpO2 < limit for spo2_low, > limit for *_high) and stays
//     present until a sample at or past limit ± hysteresis;
//   - a missing value (NaN or implausible) changes no condition's presence,
//     but time passes: an alarm is announced, or escalated by duration, at
//     the first sample (with or without a value) at which it has been present
//     long enough; escalation by depth needs a value;
//   - desaturation: the baseline is the highest valid SpO2 in the preceding
//     baseline window (120 s by default, the current sample included); the
//     condition is present when SpO2 <= baseline - limit (a drop of at least
//     limit points), the baseline is frozen at onset, and the condition
//     clears when the drop is below limit - hysteresis;
//   - signal_lost is present from the first sample without a valid SpO2 to
//     the next sample with one; signal_poor is SQI < limit; perfusion_low is
//     PI < limit; device_offline follows Engine.SetOffline and
//     device_clock_fault Engine.SetClockFault, and Engine.Tick lets time pass
//     for these three without samples;
//   - device_clock_fault (the gateway refuses or distrusts the device's
//     clock) is always evaluated: a profile without one gets
//     DefaultClockFault, since an alarm system must not be silently
//     disabled (IEC 60601-1-8);
//   - Engine.Rewind brings a clock that is ahead of now back (a restored
//     state with a future time), erring towards announcing;
//   - samples whose time is not after the last evaluated one are ignored, so
//     a sample resent after a reconnect never counts twice;
//   - differences of times and of SpO2 (t - onset >= delay, baseline - SpO2
//     >= drop) are compared with a tolerance of 1e-6, so that decimal times
//     like 65.1 - 50.1 meet a 15 s delay;
//   - min_spo2 covers the valid SpO2 samples from onset to end inclusive; the
//     oxygen deficit holds each valid SpO2 until the next sample (a missing
//     sample stops the hold) and integrates it below the limit (spo2_low) or
//     the frozen baseline (desaturation), in %·s.
//
// Conditions do not interact: each has its own state, and a profile's
// episodes in replay are the union of the episodes of each condition
// replayed alone (only Acknowledge and Pause act on all of a stream's
// conditions at once). Event order within one sample follows the profile.
//
// Speed: Eval does not allocate; Engine.Run reuses an engine across streams
// (the tuning sweep and replay use the same code). BenchmarkReplay reports
// ns per sample per profile.
//
// Persistence: Engine.Revision increases with every event; Engine.Snapshot
// is a versioned JSON-able State; Restore rebuilds an engine from it before
// anything is evaluated, emits nothing, and never announces a restored
// episode again.
//
// It is a research tool, not a certified medical alarm: settings are the
// clinical team's decision.
package alarms
