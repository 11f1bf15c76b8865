package alarms

import (
	"fmt"
	"math"
	"strings"
	"testing"
)

// step is one input to an engine in a scripted scenario.
type step struct {
	op      string  // "s" sample, "tick", "off", "on", "ack", "pause", "resume"
	t       float64 // seconds
	spo2    float64
	pulse   float64
	pi, sqi float64
	until   float64
	who     string
}

// s is a sample with SpO2 only (NaN = missing).
func s(t, spo2 float64) step {
	return step{op: "s", t: t, spo2: spo2, pulse: math.NaN(), pi: math.NaN(), sqi: math.NaN()}
}

// sp is a sample with SpO2 and pulse.
func sp(t, spo2, pulse float64) step { st := s(t, spo2); st.pulse = pulse; return st }

var nan = math.NaN()

func mustProfile(t testing.TB, y string) *Profile {
	t.Helper()
	p, err := ParseProfile([]byte(y))
	if err != nil {
		t.Fatalf("profile: %v\n%s", err, y)
	}
	return p
}

// fmtEvent renders an event compactly: "18 announced spo2_low medium".
func fmtEvent(ev Event) string {
	var b strings.Builder
	fmt.Fprintf(&b, "%g %s", ev.T, ev.Type)
	switch ev.Type {
	case EventPaused:
		fmt.Fprintf(&b, " by %s until %g", ev.Who, ev.Until)
	case EventResumed:
		if ev.Who != "" {
			fmt.Fprintf(&b, " by %s", ev.Who)
		}
	default:
		fmt.Fprintf(&b, " %s %s", ev.Episode.Condition, ev.Episode.Priority)
		if ev.Who != "" {
			fmt.Fprintf(&b, " by %s", ev.Who)
		}
		if ev.Type == EventEnded && ev.Episode.Phase == Latched {
			b.WriteString(" latched")
		}
	}
	if ev.Paused && ev.Type != EventPaused {
		b.WriteString(" (paused)")
	}
	return b.String()
}

// script runs steps on e and returns the rendered events.
func script(t testing.TB, e *Engine, steps []step) []string {
	t.Helper()
	var out []string
	emit := func(ev Event) { out = append(out, fmtEvent(ev)) }
	for _, st := range steps {
		switch st.op {
		case "s":
			e.Eval(Sample{T: st.t, SpO2: st.spo2, Pulse: st.pulse, PI: st.pi, SQI: st.sqi}, emit)
		case "tick":
			e.Tick(st.t, emit)
		case "off":
			e.SetOffline(true, st.t, emit)
		case "on":
			e.SetOffline(false, st.t, emit)
		case "ack":
			e.Acknowledge(st.who, st.t, emit)
		case "pause":
			if err := e.Pause(st.who, st.t, st.until, emit); err != nil {
				t.Fatalf("pause: %v", err)
			}
		case "resume":
			e.Resume(st.who, st.t, emit)
		default:
			t.Fatalf("bad op %q", st.op)
		}
	}
	return out
}

const spo2LowProfile = `
name: rules
conditions:
  - kind: spo2_low
    limit: 90
    hysteresis: 2
    delay: 15s
    priority: medium
    escalate: {below: 85, after: 60s, priority: high}
`

// Table of the contract's rules for a threshold condition (docs/contracts.md,
// "Alarm profile file"). IEC 60601-1-8 vocabulary: the
// alarm limit is the threshold that determines an alarm condition; the
// alarm condition delay is the time from the triggering event (onset) to the
// system determining that the alarm condition exists (announced); medium
// priority = prompt response, high = immediate response.
func TestThresholdRules(t *testing.T) {
	for _, tc := range []struct {
		name  string
		steps []step
		want  []string
	}{
		{
			name:  "equality at the limit is not present (present means SpO2 < limit)",
			steps: []step{s(0, 95), s(1, 90), s(20, 90), s(40, 90)},
			want:  nil,
		},
		{
			name:  "just below the limit is present at that sample",
			steps: []step{s(0, 95), s(1, 89.9)},
			want:  []string{"1 onset spo2_low medium"},
		},
		{
			name:  "inside the hysteresis band the condition stays present and is announced after the delay",
			steps: []step{s(0, 89), s(5, 91), s(10, 91.9), s(15, 91.5), s(16, 92)},
			want:  []string{"0 onset spo2_low medium", "15 announced spo2_low medium", "16 ended spo2_low medium"},
		},
		{
			name:  "limit + hysteresis clears exactly",
			steps: []step{s(0, 89), s(20, 89), s(21, 92)},
			want:  []string{"0 onset spo2_low medium", "20 announced spo2_low medium", "21 ended spo2_low medium"},
		},
		{
			name:  "a condition that clears just before the delay is withdrawn: no alarm condition",
			steps: []step{s(0, 89), s(14.999, 89), s(14.9995, 92), s(40, 89)},
			want:  []string{"0 onset spo2_low medium", "14.9995 withdrawn spo2_low medium", "40 onset spo2_low medium"},
		},
		{
			name:  "present for exactly the delay is announced (at least delay)",
			steps: []step{s(10.1, 89), s(25.1, 89)},
			want:  []string{"10.1 onset spo2_low medium", "25.1 announced spo2_low medium"},
		},
		{
			name:  "missing samples change nothing: no clear, no onset, but time passes (announced at a missing sample)",
			steps: []step{s(0, 95), s(1, nan), s(2, 89), s(5, nan), s(17, nan), s(30, nan), s(31, 92)},
			want:  []string{"2 onset spo2_low medium", "17 announced spo2_low medium", "31 ended spo2_low medium"},
		},
		{
			name:  "implausible values count as missing (SpO2 0 or above 100)",
			steps: []step{s(0, 89), s(10, 0), s(12, 101), s(15, 89)},
			want:  []string{"0 onset spo2_low medium", "15 announced spo2_low medium"},
		},
		{
			name:  "escalation by depth (below 85) to high priority, at or after announcement only",
			steps: []step{s(0, 84), s(10, 84), s(15, 86), s(16, 84.9), s(30, 93)},
			want:  []string{"0 onset spo2_low medium", "15 announced spo2_low medium", "16 escalated spo2_low high", "30 ended spo2_low high"},
		},
		{
			name:  "escalation by depth at the announcing sample itself",
			steps: []step{s(0, 89), s(15, 80)},
			want:  []string{"0 onset spo2_low medium", "15 announced spo2_low medium", "15 escalated spo2_low high"},
		},
		{
			name:  "escalation by duration (present 60 s) even at a missing sample",
			steps: []step{s(0, 89), s(15, 89), s(59, 89), s(60, nan), s(70, 89)},
			want:  []string{"0 onset spo2_low medium", "15 announced spo2_low medium", "60 escalated spo2_low high"},
		},
		{
			name:  "escalation happens once",
			steps: []step{s(0, 80), s(15, 80), s(60, 80), s(61, 70)},
			want:  []string{"0 onset spo2_low medium", "15 announced spo2_low medium", "15 escalated spo2_low high"},
		},
		{
			name:  "the clearing sample ends the episode before any escalation by duration",
			steps: []step{s(0, 89), s(15, 89), s(60, 95)},
			want:  []string{"0 onset spo2_low medium", "15 announced spo2_low medium", "60 ended spo2_low medium"},
		},
		{
			name:  "duplicate and out-of-order sample times are ignored",
			steps: []step{s(0, 89), s(0, 95), s(10, 89), s(5, 95), s(15, 89)},
			want:  []string{"0 onset spo2_low medium", "15 announced spo2_low medium"},
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			e, err := NewEngine(mustProfile(t, spo2LowProfile), "bed-1")
			if err != nil {
				t.Fatal(err)
			}
			got := script(t, e, tc.steps)
			if strings.Join(got, "\n") != strings.Join(tc.want, "\n") {
				t.Errorf("events:\n  %s\nwant:\n  %s", strings.Join(got, "\n  "), strings.Join(tc.want, "\n  "))
			}
		})
	}
}

// The mirrored and technical kinds, one rule each. Priorities as in IEC
// 60601-1-8: low = awareness (technical conditions here), medium = prompt
// response, high = immediate response; the delay is the alarm condition
// delay (onset to announcement).
func TestOtherKinds(t *testing.T) {
	mk := func(kind, rest string) string {
		return "name: k\nconditions:\n  - {kind: " + kind + ", " + rest + "}\n"
	}
	smp := func(t, spo2, pulse, pi, sqi float64) step {
		return step{op: "s", t: t, spo2: spo2, pulse: pulse, pi: pi, sqi: sqi}
	}
	for _, tc := range []struct {
		name, profile string
		steps         []step
		want          []string
	}{
		{
			name:    "spo2_high mirrors: present above the limit, clears at limit - hysteresis",
			profile: mk("spo2_high", "limit: 96, hysteresis: 1, delay: 0s, priority: low"),
			steps:   []step{s(0, 96), s(1, 97), s(2, 95.5), s(3, 95)},
			want:    []string{"1 onset spo2_high low", "1 announced spo2_high low", "3 ended spo2_high low"},
		},
		{
			name:    "pulse_low: equality at the limit is not present",
			profile: mk("pulse_low", "limit: 40, hysteresis: 5, delay: 10s, priority: medium"),
			steps:   []step{sp(0, 97, 40), sp(1, 97, 39), sp(11, 97, 44), sp(12, 97, 45)},
			want:    []string{"1 onset pulse_low medium", "11 announced pulse_low medium", "12 ended pulse_low medium"},
		},
		{
			name:    "pulse_high escalates above the escalation value, only after announcement",
			profile: mk("pulse_high", "limit: 120, hysteresis: 5, delay: 10s, priority: low, escalate: {above: 140, priority: medium}"),
			steps:   []step{sp(0, 97, 150), sp(9, 97, 150), sp(10, 97, 130), sp(11, 97, 141)},
			want:    []string{"0 onset pulse_high low", "10 announced pulse_high low", "11 escalated pulse_high medium"},
		},
		{
			name:    "signal_poor: SQI below the limit; a missing SQI changes nothing",
			profile: mk("signal_poor", "limit: 0.3, hysteresis: 0.1, delay: 5s, priority: low"),
			steps:   []step{smp(0, 97, 70, 2, 0.2), smp(5, 97, 70, 2, nan), smp(6, 97, 70, 2, 0.39), smp(7, 97, 70, 2, 0.4)},
			want:    []string{"0 onset signal_poor low", "5 announced signal_poor low", "7 ended signal_poor low"},
		},
		{
			name:    "perfusion_low: PI below the limit",
			profile: mk("perfusion_low", "limit: 0.3, hysteresis: 0.1, delay: 0s, priority: low"),
			steps:   []step{smp(0, 97, 70, 0.3, 1), smp(1, 97, 70, 0.29, 1), smp(2, 97, 70, 0.4, 1)},
			want:    []string{"1 onset perfusion_low low", "1 announced perfusion_low low", "2 ended perfusion_low low"},
		},
		{
			name:    "signal_lost: no valid SpO2 for the delay, timed by samples or by Tick; escalates by duration",
			profile: mk("signal_lost", "delay: 20s, priority: low, escalate: {after: 40s, priority: medium}"),
			steps:   []step{s(0, 97), s(1, nan), {op: "tick", t: 20}, {op: "tick", t: 21}, s(30, nan), {op: "tick", t: 41}, s(50, 96)},
			want:    []string{"1 onset signal_lost low", "21 announced signal_lost low", "41 escalated signal_lost medium", "50 ended signal_lost medium"},
		},
		{
			name:    "device_offline follows SetOffline; Tick announces after the delay",
			profile: mk("device_offline", "delay: 60s, priority: low, escalate: {after: 300s, priority: medium}"),
			steps:   []step{{op: "off", t: 100}, {op: "tick", t: 159}, {op: "tick", t: 160}, {op: "tick", t: 400}, {op: "on", t: 401}, {op: "off", t: 500}, {op: "on", t: 510}},
			want: []string{"100 onset device_offline low", "160 announced device_offline low", "400 escalated device_offline medium",
				"401 ended device_offline medium", "500 onset device_offline low", "510 withdrawn device_offline low"},
		},
		{
			name:    "desaturation: a drop of exactly the limit below the running baseline is present; baseline frozen at onset",
			profile: mk("desaturation", "limit: 3, hysteresis: 1, delay: 10s, baseline: 60s, priority: low"),
			steps:   []step{s(0, 97), s(5, 94.1), s(6, 94), s(16, 95), s(17, 96)},
			want:    []string{"6 onset desaturation low", "16 announced desaturation low", "17 ended desaturation low"},
		},
		{
			name:    "desaturation: the baseline forgets values older than its window",
			profile: mk("desaturation", "limit: 3, delay: 0s, baseline: 60s, priority: low"),
			// With 99 still in the window, 95.5 at t=62 would be a 3.5 drop.
			steps: []step{s(0, 99), s(30, 97), s(61, 97), s(62, 95.5), s(63, 94)},
			want:  []string{"63 onset desaturation low", "63 announced desaturation low"},
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			e, err := NewEngine(mustProfile(t, tc.profile), "d")
			if err != nil {
				t.Fatal(err)
			}
			got := script(t, e, tc.steps)
			if strings.Join(got, "\n") != strings.Join(tc.want, "\n") {
				t.Errorf("events:\n  %s\nwant:\n  %s", strings.Join(got, "\n  "), strings.Join(tc.want, "\n  "))
			}
		})
	}
}
