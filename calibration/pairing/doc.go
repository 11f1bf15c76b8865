// Package pairing turns recordings into calibration pairs: a prototype's raw
// two-channel PPG (CSV) runs through the estimator, which gives a ratio of
// ratios and a signal quality per second; a reference file gives the
// reference SpO2 on the same clock; calibration.Align keeps the stable,
// good-quality stretches and says how many it dropped and why.
//
// It lives apart from package calibration so that calibration stays free of
// the estimator (the estimator may use calibration curves).
package pairing
