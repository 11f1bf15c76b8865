package calibration

import (
	"fmt"
	"math"

	"github.com/pulsefleet/pulsefleet/internal/stats"
)

// AnchorOptions say how a recording's room-air anchor is taken.
type AnchorOptions struct {
	// LengthS is how many seconds the anchor covers (the person at rest on
	// room air); > 0.
	LengthS int
	// AtRecordingStart starts the anchor at the recording's first device
	// second (docs/calibration-protocol.md, version 1); false starts it at
	// the first usable second, as a device told to anchor would
	// (version 2).
	AtRecordingStart bool
	// MinSQI is the signal quality a second needs to count; 0 = 0.5.
	MinSQI float64
	// MinSeconds is the number of usable seconds the anchor needs; fewer
	// and the recording has no anchor. 0 = 10.
	MinSeconds int
}

// Anchor is the room-air anchor R0 of a recording: the median of the
// per-second ratios with SQI >= MinSQI among LengthS seconds counted from
// its first usable second (or from its first second: AtRecordingStart). Dividing every ratio of the
// recording by R0 (Anchored) removes a person's or a probe placement's
// multiplicative offset in R, which does not transfer from one person to
// another; the calibration curve then maps R/R0 to SpO2. n is the number
// of usable seconds the anchor is the median of; ok is false when n <
// MinSeconds.
func Anchor(dev []DeviceSecond, o AnchorOptions) (r0 float64, n int, ok bool, err error) {
	if o.LengthS <= 0 || o.LengthS > 86400 {
		return 0, 0, false, fmt.Errorf("anchor: LengthS: %d s, want 1..86400", o.LengthS)
	}
	if o.MinSQI == 0 {
		o.MinSQI = 0.5
	}
	if o.MinSeconds == 0 {
		o.MinSeconds = 10
	}
	if !(o.MinSQI > 0 && o.MinSQI <= 1) || o.MinSeconds < 1 {
		return 0, 0, false, fmt.Errorf("anchor: MinSQI %v (want (0, 1]) or MinSeconds %d (want >= 1)", o.MinSQI, o.MinSeconds)
	}
	if len(dev) == 0 {
		return math.NaN(), 0, false, nil
	}
	usable := func(d DeviceSecond) bool { return !math.IsNaN(d.Ratio) && d.Ratio > 0 && d.SQI >= o.MinSQI }
	first := int64(math.MaxInt64)
	for _, d := range dev {
		if o.AtRecordingStart || usable(d) {
			first = min(first, d.Second)
		}
	}
	var rs []float64
	for _, d := range dev {
		if d.Second >= first && d.Second < first+int64(o.LengthS) && usable(d) {
			rs = append(rs, d.Ratio)
		}
	}
	if len(rs) < o.MinSeconds {
		return math.NaN(), len(rs), false, nil
	}
	return stats.Median(rs), len(rs), true, nil
}

// Anchored returns a copy of dev with every ratio divided by r0 (NaN stays
// NaN).
func Anchored(dev []DeviceSecond, r0 float64) []DeviceSecond {
	out := make([]DeviceSecond, len(dev))
	for i, d := range dev {
		out[i] = d
		out[i].Ratio = d.Ratio / r0
	}
	return out
}
