package tune

import (
	"context"
	"math"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// handTrends is a small hand-written record (1 Hz, invented):
//
//	device a: t 0-4 95 | 5-9 89 | 10 91 | 11 93 | 12-26 87 | 27 91 | 28 89 | 29 93 | 30-34 95
//	device b: t 0-2 96 | 3-8 86 | 9-13 missing | 14-20 95
func handTrends() []alarms.Trend {
	var a, b []alarms.Sample
	add := func(dst *[]alarms.Sample, from, to int, v float64) {
		for t := from; t <= to; t++ {
			*dst = append(*dst, alarms.Sample{T: float64(t), SpO2: v, Pulse: 70, PI: 2, SQI: 0.9})
		}
	}
	add(&a, 0, 4, 95)
	add(&a, 5, 9, 89)
	add(&a, 10, 10, 91)
	add(&a, 11, 11, 93)
	add(&a, 12, 26, 87)
	add(&a, 27, 27, 91)
	add(&a, 28, 28, 89)
	add(&a, 29, 29, 93)
	add(&a, 30, 34, 95)
	add(&b, 0, 2, 96)
	add(&b, 3, 8, 86)
	add(&b, 9, 13, math.NaN())
	add(&b, 14, 20, 95)
	return []alarms.Trend{{Device: "a", Samples: a}, {Device: "b", Samples: b}}
}

const handGrid = `
base:
  name: hand
  conditions:
    - {kind: spo2_low, limit: 90, hysteresis: 0, delay: 0s, priority: medium}
sweep:
  spo2_low.limit: [88, 90]
  spo2_low.delay: [0s, 10s]
  spo2_low.hysteresis: [0, 2]
reference:
  rule: {below: 88, for: 10s}
  grace: 5s
`

// TestHandWorkedGrid checks every grid point of handGrid against counts
// worked out by hand from the condition semantics of docs/contracts.md (present at
// SpO2 < limit, clears at >= limit + hysteresis, announced once present for
// the delay, a missing value changes nothing but time passes):
//
// device a, limit 90:
//
//	hyst 0, delay 0:  (5..10) (12..27) (28..29)            -> 3
//	hyst 0, delay 10: dip 5-9 clears at 10 before 10 s; 12 announced at 22, ends 27;
//	                  28 clears at 29                       -> 1
//	hyst 2, delay 0:  91 at 10 and 27 does not clear (< 92): (5..11) (12..29) -> 2
//	hyst 2, delay 10: 5 clears at 11 after 6 s; 12 announced at 22, ends 29  -> 1
//
// device a, limit 88: only the 87 % stretch is present (89 is not < 88):
// one episode (12..27) for every hysteresis (91 >= 88 and >= 90) and delay.
//
// device b, both limits: present from 3; missing 9-13 keep it present; with
// delay 10 it is announced at 13, a missing sample (13 - 3 = 10 s); 95 at
// 14 clears it: one episode everywhere.
//
// Reference rule SpO2 < 88 for >= 10 s: a [12, 27) (15 s), b [3, 14) (11 s;
// missing samples do not break it) -> 2 events.
func TestHandWorkedGrid(t *testing.T) {
	g, err := ParseGrid([]byte(handGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	res, err := Run(context.Background(), g, handTrends(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	if res.Events != 2 {
		t.Errorf("events %d, want 2 (worked above)", res.Events)
	}
	// Grid order: limit, delay, hysteresis; the last key varies fastest.
	want := []struct {
		vals     string
		episodes int
		sens     float64
		ppv      float64
		delay    float64
	}{
		{"88,0s,0", 2, 1, 1, 0},
		{"88,0s,2", 2, 1, 1, 0},
		{"88,10s,0", 2, 1, 1, 10},  // a: 22-12; b: 13-3
		{"88,10s,2", 2, 1, 1, 10},  //
		{"90,0s,0", 4, 1, 0.75, 0}, // a's (5..10) ends before the event: false positive; (28..29) is within the 5 s grace: true
		{"90,0s,2", 3, 1, 2.0 / 3, 0},
		{"90,10s,0", 2, 1, 1, 10},
		{"90,10s,2", 2, 1, 1, 10},
	}
	if len(res.Rows) != len(want) {
		t.Fatalf("%d rows, want %d", len(res.Rows), len(want))
	}
	for i, w := range want {
		r := res.Rows[i]
		if got := strings.Join(res.Points[i].Values, ","); got != w.vals {
			t.Fatalf("point %d values %s, want %s", i, got, w.vals)
		}
		if r.Episodes != w.episodes {
			t.Errorf("%s: episodes %d, want %d (hand-worked)", w.vals, r.Episodes, w.episodes)
		}
		if r.Sensitivity != w.sens || math.Abs(r.PPV-w.ppv) > 1e-12 || r.MedianDelayS != w.delay {
			t.Errorf("%s: sensitivity %v ppv %v median delay %v, want %v %v %v", w.vals, r.Sensitivity, r.PPV, r.MedianDelayS, w.sens, w.ppv, w.delay)
		}
		if r.ByPriority[alarms.PriorityMedium].Episodes != r.Episodes {
			t.Errorf("%s: medium episodes %d, want all %d", w.vals, r.ByPriority[alarms.PriorityMedium].Episodes, r.Episodes)
		}
	}
	// Monitored: a 0..34 = 34 s, b 0..20 = 20 s. Point 90,0s,0 is in alarm
	// 5+15+1 s on a and 11 s on b: 32 of 54 s. Durations 5, 15, 1, 11: median 8.
	r := res.Rows[4]
	if res.MonitoredS != 54 {
		t.Errorf("monitored %v s, want 54", res.MonitoredS)
	}
	if math.Abs(r.TimeInAlarmPct-100*32.0/54) > 1e-9 || r.MedianEpisodeS != 8 {
		t.Errorf("time in alarm %v %%, median episode %v s, want %v and 8", r.TimeInAlarmPct, r.MedianEpisodeS, 100*32.0/54)
	}
	if math.Abs(r.PerDeviceDay-4/(54.0/86400)) > 1e-6 {
		t.Errorf("per device-day %v, want %v", r.PerDeviceDay, 4/(54.0/86400))
	}
}
