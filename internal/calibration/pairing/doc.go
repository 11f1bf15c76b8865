// Package pairing turns recordings into calibration pairs: a prototype's raw
// two-channel PPG (CSV) runs through the estimator, which gives a ratio of
// ratios and a signal quality per second; a reference file gives the
// reference SpO2 on the same clock; calibration.Align keeps the stable,
// good-quality stretches and says how many it dropped and why.
//
// Study pairs a set of recordings under several variants (channel pair,
// ratio method, reference lag, room-air anchor length) from one read of
// each, and offers rules for choosing among them that never score a
// variant across people (RuleChooser, TrackingChooser); Study.Nested and
// Study.With evaluate a choice over every recorded subject.
//
// It lives apart from package calibration so that calibration stays free of
// the estimator (the estimator may use calibration curves).
package pairing
