package alarms

import (
	"errors"
	"math"
	"strings"
	"testing"
	"time"
)

const latchingProfile = `
name: latch
conditions:
  - kind: spo2_low
    limit: 90
    hysteresis: 2
    delay: 5s
    priority: medium
    escalate: {below: 85, priority: high}
    latching: true
`

// IEC 60601-1-8 latching alarm signal: it continues after its triggering
// event ends until stopped by deliberate operator action (docs/references.md,
// memory); acknowledgement records who and when.
func TestLatchingAndAcknowledgement(t *testing.T) {
	ack := func(tm float64, who string) step { return step{op: "ack", t: tm, who: who} }
	for _, tc := range []struct {
		name     string
		steps    []step
		want     []string
		priority Priority // Engine.Priority() after the steps
	}{
		{
			name:     "a latching alarm stays signalled after the condition ends, until acknowledged",
			steps:    []step{s(0, 89), s(5, 89), s(10, 93)},
			want:     []string{"0 onset spo2_low medium", "5 announced spo2_low medium", "10 ended spo2_low medium latched"},
			priority: PriorityMedium,
		},
		{
			name:     "acknowledging the latched episode stops its signal",
			steps:    []step{s(0, 89), s(5, 89), s(10, 93), ack(12, "nurse-a")},
			want:     []string{"0 onset spo2_low medium", "5 announced spo2_low medium", "10 ended spo2_low medium latched", "12 acknowledged spo2_low medium by nurse-a"},
			priority: PriorityNone,
		},
		{
			name:     "acknowledged while active: ends without latching",
			steps:    []step{s(0, 89), s(5, 89), ack(6, "nurse-a"), s(10, 93)},
			want:     []string{"0 onset spo2_low medium", "5 announced spo2_low medium", "6 acknowledged spo2_low medium by nurse-a", "10 ended spo2_low medium"},
			priority: PriorityNone,
		},
		{
			name:  "an escalation after the acknowledgement needs a new one (and latches again)",
			steps: []step{s(0, 89), s(5, 89), ack(6, "nurse-a"), s(7, 84), s(10, 93), ack(11, "nurse-b"), ack(12, "nurse-c")},
			want: []string{"0 onset spo2_low medium", "5 announced spo2_low medium", "6 acknowledged spo2_low medium by nurse-a",
				"7 escalated spo2_low high", "10 ended spo2_low high latched", "11 acknowledged spo2_low high by nurse-b"},
			priority: PriorityNone,
		},
		{
			name:     "a pending condition cannot be acknowledged",
			steps:    []step{s(0, 89), ack(1, "nurse-a")},
			want:     []string{"0 onset spo2_low medium"},
			priority: PriorityNone,
		},
		{
			name:  "a new episode while the last one is latched: both signalled, one acknowledgement stops both",
			steps: []step{s(0, 89), s(5, 89), s(10, 93), s(20, 84), s(25, 84), ack(26, "nurse-a")},
			want: []string{"0 onset spo2_low medium", "5 announced spo2_low medium", "10 ended spo2_low medium latched",
				"20 onset spo2_low medium", "25 announced spo2_low medium", "25 escalated spo2_low high",
				"26 acknowledged spo2_low medium by nurse-a", "26 acknowledged spo2_low high by nurse-a"},
			priority: PriorityHigh, // the new episode is still active (acknowledged, not over)
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			e, err := NewEngine(mustProfile(t, latchingProfile), "bed-2")
			if err != nil {
				t.Fatal(err)
			}
			got := script(t, e, tc.steps)
			if strings.Join(got, "\n") != strings.Join(tc.want, "\n") {
				t.Errorf("events:\n  %s\nwant:\n  %s", strings.Join(got, "\n  "), strings.Join(tc.want, "\n  "))
			}
			if p := e.Priority(); p != tc.priority {
				t.Errorf("Priority() = %s, want %s", p, tc.priority)
			}
		})
	}
}

func TestAcknowledgementIsRecordedOnTheEpisode(t *testing.T) {
	e, _ := NewEngine(mustProfile(t, latchingProfile), "bed-2")
	var last Event
	emit := func(ev Event) { last = ev }
	for _, st := range []step{s(0, 89), s(5, 89), s(10, 93)} {
		e.Eval(Sample{T: st.t, SpO2: st.spo2, Pulse: nan, PI: nan, SQI: nan}, emit)
	}
	if n := e.Acknowledge("nurse-a", 12.5, emit); n != 1 {
		t.Fatalf("Acknowledge = %d, want 1", n)
	}
	ep := last.Episode
	if ep.AckedBy != "nurse-a" || ep.AckedS != 12.5 || ep.EndedS != 10 || ep.Phase != Inactive || last.Who != "nurse-a" {
		t.Errorf("acknowledged episode %+v (who %q)", ep, last.Who)
	}
	if got := e.Episodes(nil); len(got) != 0 {
		t.Errorf("open episodes after acknowledging the latch: %+v", got)
	}
	if n := e.Acknowledge("nurse-a", 13, emit); n != 0 {
		t.Errorf("second Acknowledge = %d, want 0", n)
	}
}

// The stream's priority is the highest active one (IEC 60601-1-8: high =
// immediate response beats medium = prompt response beats low = awareness).
func TestStreamPriorityIsHighestActive(t *testing.T) {
	p := mustProfile(t, `
name: two
conditions:
  - {kind: spo2_low, limit: 90, delay: 0s, priority: medium}
  - {kind: pulse_high, limit: 120, delay: 0s, priority: low, escalate: {above: 140, priority: high}}
  - {kind: pulse_low, limit: 40, delay: 30s, priority: high}
`)
	e, _ := NewEngine(p, "x")
	steps := []struct {
		st   step
		want Priority
	}{
		{sp(0, 95, 80), PriorityNone},
		{sp(1, 95, 125), PriorityLow},
		{sp(2, 89, 125), PriorityMedium},
		{sp(3, 89, 145), PriorityHigh},
		{sp(4, 95, 100), PriorityNone},
		{sp(5, 95, 30), PriorityNone}, // pending pulse_low is not active
		{sp(35, 95, 30), PriorityHigh},
	}
	for _, x := range steps {
		e.Eval(Sample{T: x.st.t, SpO2: x.st.spo2, Pulse: x.st.pulse, PI: nan, SQI: nan}, nil)
		if got := e.Priority(); got != x.want {
			t.Errorf("t=%g: Priority() = %s, want %s", x.st.t, got, x.want)
		}
	}
}

// Pause (IEC 60601-1-8 "alarm paused", memory): alarm signals are not
// generated for a bounded time; evaluation and the log go on.
func TestPause(t *testing.T) {
	pause := func(tm, until float64, who string) step { return step{op: "pause", t: tm, until: until, who: who} }
	for _, tc := range []struct {
		name  string
		steps []step
		want  []string
	}{
		{
			name:  "events during a pause are logged, marked paused; the pause expires at the first input at or after its end",
			steps: []step{pause(0, 120, "nurse-b"), s(1, 89), s(16, 89), s(119, 89), s(125, 89), s(130, 93)},
			want: []string{"0 paused by nurse-b until 120", "1 onset spo2_low medium (paused)", "16 announced spo2_low medium (paused)",
				"120 resumed", "130 ended spo2_low medium"},
		},
		{
			name:  "resume early by an operator",
			steps: []step{pause(0, 60, "nurse-b"), s(1, 89), {op: "resume", t: 10, who: "nurse-c"}, s(16, 89)},
			want:  []string{"0 paused by nurse-b until 60", "1 onset spo2_low medium (paused)", "10 resumed by nurse-c", "16 announced spo2_low medium"},
		},
		{
			name:  "Tick ends an expired pause without samples",
			steps: []step{pause(0, 60, "nurse-b"), {op: "tick", t: 61}},
			want:  []string{"0 paused by nurse-b until 60", "60 resumed"},
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			e, _ := NewEngine(mustProfile(t, latchingProfile[:strings.Index(latchingProfile, "    latching")]), "bed-3")
			got := script(t, e, tc.steps)
			if strings.Join(got, "\n") != strings.Join(tc.want, "\n") {
				t.Errorf("events:\n  %s\nwant:\n  %s", strings.Join(got, "\n  "), strings.Join(tc.want, "\n  "))
			}
		})
	}
	e, _ := NewEngine(mustProfile(t, spo2LowProfile), "bed-3")
	// DefaultPauseMax is 2 minutes (team choice); a pause is always bounded.
	for _, tc := range []struct{ from, until float64 }{{0, 121}, {10, 10}, {10, 5}, {0, math.Inf(1)}} {
		if err := e.Pause("nurse-b", tc.from, tc.until, nil); !errors.Is(err, ErrPause) {
			t.Errorf("Pause(%g, %g) = %v, want ErrPause", tc.from, tc.until, err)
		}
	}
	if err := e.Pause("nurse-b", 0, 120, nil); err != nil {
		t.Errorf("Pause for exactly pause_max: %v", err)
	}
	if by, until, ok := e.Paused(50); !ok || by != "nurse-b" || until != 120 {
		t.Errorf("Paused(50) = %q %g %v", by, until, ok)
	}
}

// Minimum SpO2 and oxygen deficit, worked by hand.
func TestEpisodeMinimumAndDeficit(t *testing.T) {
	for _, tc := range []struct {
		name, profile string
		steps         []step
		min, deficit  float64
	}{
		{
			// Deficit below the limit 90, each valid sample held until the
			// next sample: 1x1 (89 for 1 s) + 2x2 (88 for 2 s) + 3x1 (87 for
			// 1 s) + 0 (missing from 4 to 6) + 4x2 (86 for 2 s) = 16 %·s.
			name:    "spo2_low",
			profile: "name: d\nconditions:\n  - {kind: spo2_low, limit: 90, hysteresis: 2, delay: 0s, priority: low}\n",
			steps:   []step{s(0, 89), s(1, 88), s(3, 87), s(4, nan), s(6, 86), s(8, 92)},
			min:     86, deficit: 16,
		},
		{
			// Baseline 97 frozen at onset (t=1): 3 (94 for 1 s) + 4x2 (93
			// for 2 s) = 11 %·s below the baseline.
			name:    "desaturation",
			profile: "name: d\nconditions:\n  - {kind: desaturation, limit: 3, hysteresis: 1, delay: 0s, priority: low}\n",
			steps:   []step{s(0, 97), s(1, 94), s(2, 93), s(4, 96)},
			min:     93, deficit: 11,
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			p := mustProfile(t, tc.profile)
			var eps []Episode
			samples := make([]Sample, len(tc.steps))
			for i, st := range tc.steps {
				samples[i] = Sample{T: st.t, SpO2: st.spo2, Pulse: nan, PI: nan, SQI: nan}
			}
			if err := Replay(p, "x", samples, func(ep Episode) { eps = append(eps, ep) }); err != nil {
				t.Fatal(err)
			}
			if len(eps) != 1 || eps[0].MinSpO2 != tc.min || math.Abs(eps[0].DeficitPctS-tc.deficit) > 1e-9 {
				t.Fatalf("episodes %+v, want one with min %g and deficit %g", eps, tc.min, tc.deficit)
			}
		})
	}
}

// A profile change keeps the state of conditions that stay, never announces
// twice, and closes what it removes.
func TestSetProfile(t *testing.T) {
	p15 := mustProfile(t, spo2LowProfile)
	e, _ := NewEngine(p15, "bed-4")
	var got []string
	emit := func(ev Event) { got = append(got, fmtEvent(ev)) }
	e.Eval(Sample{T: 0, SpO2: 89, Pulse: nan, PI: nan, SQI: nan}, emit)
	// Longer delay while pending: announced at 30, not 15.
	p30 := p15.Clone()
	if err := p30.Set("spo2_low.delay", "30s"); err != nil {
		t.Fatal(err)
	}
	if err := e.SetProfile(p30, 5, emit); err != nil {
		t.Fatal(err)
	}
	for _, tm := range []float64{15, 29, 30, 31} {
		e.Eval(Sample{T: tm, SpO2: 89, Pulse: nan, PI: nan, SQI: nan}, emit)
	}
	// Add a latching pulse_low, trigger it, clear it (latched), then remove
	// both conditions: spo2_low (active) ends, the latch is released.
	withPulse := mustProfile(t, spo2LowProfile+"  - {kind: pulse_low, limit: 40, delay: 0s, priority: high, latching: true}\n")
	withPulse.Conditions[0].Delay = p30.Conditions[0].Delay
	if err := e.SetProfile(withPulse, 32, emit); err != nil {
		t.Fatal(err)
	}
	e.Eval(Sample{T: 33, SpO2: 89, Pulse: 35, PI: nan, SQI: nan}, emit)
	e.Eval(Sample{T: 34, SpO2: 89, Pulse: 60, PI: nan, SQI: nan}, emit)
	only := mustProfile(t, "name: other\nconditions:\n  - {kind: pulse_high, limit: 140, delay: 0s, priority: low}\n")
	if err := e.SetProfile(only, 40, emit); err != nil {
		t.Fatal(err)
	}
	want := []string{"0 onset spo2_low medium", "30 announced spo2_low medium",
		"33 onset pulse_low high", "33 announced pulse_low high", "34 ended pulse_low high latched",
		"40 ended spo2_low medium", "40 released pulse_low high"}
	if strings.Join(got, "\n") != strings.Join(want, "\n") {
		t.Errorf("events:\n  %s\nwant:\n  %s", strings.Join(got, "\n  "), strings.Join(want, "\n  "))
	}
	if e.Priority() != PriorityNone || len(e.Episodes(nil)) != 0 || e.Profile().Name != "other" {
		t.Errorf("after removing everything: priority %s, episodes %v", e.Priority(), e.Episodes(nil))
	}
	bad := only.Clone()
	bad.Conditions[0].Delay = -time.Second
	if err := e.SetProfile(bad, 41, emit); err == nil || e.Profile().Name != "other" {
		t.Errorf("invalid profile: %v", err)
	}
}
