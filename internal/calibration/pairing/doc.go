// Package pairing turns recordings into calibration pairs: a prototype's raw
// two-channel PPG (CSV) runs through the estimator, which gives a ratio of
// ratios and a signal quality per second; a reference file gives the
// reference SpO2 on the same clock; calibration.Align keeps the stable,
// good-quality stretches and says how many it dropped and why.
//
// Study pairs a set of recordings under several variants (channel pair,
// ratio method, reference lag) from one read of each, and offers a rule
// for choosing among them that never scores a variant across people
// (RuleChooser).
//
// It lives apart from package calibration so that calibration stays free of
// the estimator (the estimator may use calibration curves).
package pairing
