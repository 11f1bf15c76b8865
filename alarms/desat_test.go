package alarms

import (
	"math"
	"testing"
	"time"
)

// docs/references.md (desaturation indices, seen): ODI = events per hour of valid
// recording; worked example 30 events in 7.5 h -> ODI 4.0 /h. The record is
// a 1 Hz trend over exactly 7.5 h (27000 s of intervals) at 96 % with 30
// dips to 88 % of 30 s, one every 15 minutes. T90 is then 30 x 30 s below
// 90 % out of 27000 s = 3.333 %.
func TestDesatIndicesWorkedExample(t *testing.T) {
	samples := make([]Sample, 27001)
	for i := range samples {
		v := 96.0
		if k := i % 900; i < 27000 && k >= 300 && k < 330 {
			v = 88
		}
		samples[i] = Sample{T: float64(i), SpO2: v, Pulse: nan, PI: nan, SQI: nan}
	}
	for _, drop := range []float64{3, 4} {
		ix, err := DesatIndices(samples, IndexOptions{DropPct: drop, MinDuration: 10 * time.Second})
		if err != nil {
			t.Fatal(err)
		}
		if ix.Events != 30 || ix.ValidHours != 7.5 || math.Abs(ix.ODIPerHour-4.0) > 1e-12 || math.Abs(ix.T90Pct-100.0/30) > 1e-9 {
			t.Errorf("drop %g: %+v, want 30 events, 7.5 h, ODI 4.0 /h, T90 3.333 %%", drop, ix)
		}
	}
}

// A hand-checked irregular record with a missing value and a gap longer than
// MaxGap (5 s):
//
//	t     0  1  2  3  4   5  20 21 22 23
//	SpO2 95 95 91 89  -  96  96 93 93 96
//
// Valid time: the intervals starting at a valid sample and at most 5 s long:
// 0-1, 1-2, 2-3, 3-4, 20-21, 21-22, 22-23 = 7 s (4-5 starts at a missing
// sample, 5-20 is a 15 s gap). Below 90 %: 3-4 = 1 s, T90 = 1/7 = 14.29 %.
// Events at 3 points: t=2 (95 -> 91, drop 4) and t=21 (96 -> 93, drop 3);
// at 4 points only t=2. With a minimum duration of 2 s the second is
// withdrawn (present 1 s at t=22; t=23 clears it, and a clearing sample ends
// the condition before it could count); the first counts at t=4 (present
// 2 s, at a sample without a value).
func TestDesatIndicesHandChecked(t *testing.T) {
	vals := []struct{ t, v float64 }{{0, 95}, {1, 95}, {2, 91}, {3, 89}, {4, nan}, {5, 96}, {20, 96}, {21, 93}, {22, 93}, {23, 96}}
	samples := make([]Sample, len(vals))
	for i, x := range vals {
		samples[i] = Sample{T: x.t, SpO2: x.v, Pulse: nan, PI: nan, SQI: nan}
	}
	hours := 7.0 / 3600
	for _, tc := range []struct {
		name   string
		opt    IndexOptions
		events int
	}{
		{"3 points", IndexOptions{DropPct: 3}, 2},
		{"4 points", IndexOptions{DropPct: 4}, 1},
		{"3 points, at least 2 s", IndexOptions{DropPct: 3, MinDuration: 2 * time.Second}, 1},
	} {
		ix, err := DesatIndices(samples, tc.opt)
		if err != nil {
			t.Fatal(err)
		}
		if ix.Events != tc.events || math.Abs(ix.ValidHours-hours) > 1e-12 ||
			math.Abs(ix.ODIPerHour-float64(tc.events)/hours) > 1e-9 || math.Abs(ix.T90Pct-100.0/7) > 1e-9 {
			t.Errorf("%s: %+v, want %d events over 7 s, T90 14.29 %%", tc.name, ix, tc.events)
		}
	}
	ix, _ := DesatIndices([]Sample{{T: 0, SpO2: nan}, {T: 1, SpO2: nan}}, IndexOptions{})
	if ix.ValidHours != 0 || !math.IsNaN(ix.ODIPerHour) || !math.IsNaN(ix.T90Pct) {
		t.Errorf("no valid SpO2: %+v, want 0 h and NaN indices", ix)
	}
	if _, err := DesatIndices(samples, IndexOptions{DropPct: 30}); err == nil {
		t.Error("a drop of 30 points was accepted")
	}
}
