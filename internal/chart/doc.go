// Package chart is the small kit behind pulsefleet's SVG figures (the tune
// report's frontier and limit charts, the calibration curve and
// Bland-Altman plots): one colour-blind-safe palette, round axis ticks, tick
// labels and text escaping for SVG. Each figure still lays out its own
// marks; this is not a plotting library.
package chart
