package alarms

import (
	"encoding/json"
	"fmt"
	"reflect"
	"strings"
	"testing"
)

// allEvents runs samples on e and renders every event with its full episode.
func feed(e *Engine, samples []Sample, out *[]string) {
	emit := func(ev Event) { *out = append(*out, fmt.Sprintf("%s %g %+v", ev.Type, ev.T, ev.Episode)) }
	for _, s := range samples {
		e.Eval(s, emit)
	}
}

// Snapshot mid-pending and mid-active, restore into a fresh engine (through
// JSON, as the store keeps it), continue the same input: the events equal an
// uninterrupted run, and resent samples before the snapshot are ignored, so
// nothing is announced twice.
func TestSnapshotRestoreContinuesExactly(t *testing.T) {
	p := mustProfile(t, benchProfileFull)
	samples := synthTrend(6*3600, 11)
	ref, _ := NewEngine(p, "bed-9")
	var want []string
	feed(ref, samples, &want)

	// Cut points: the first sample where some condition is pending, active
	// or latched, and every 499th sample (many of them mid-episode, and
	// within a desaturation baseline window of a dip).
	probe, _ := NewEngine(p, "bed-9")
	cuts := map[string]int{}
	for i, s := range samples {
		probe.Eval(s, nil)
		for _, ep := range probe.Episodes(nil) {
			name := "mid-" + ep.Phase.String()
			if _, ok := cuts[name]; !ok && i > 100 {
				cuts[name] = i
			}
		}
		if i%499 == 498 {
			cuts[fmt.Sprintf("at-%d", i)] = i
		}
	}
	for _, name := range []string{"mid-pending", "mid-active", "mid-latched"} {
		if _, ok := cuts[name]; !ok {
			t.Fatalf("synthetic trend never has a %s episode", name)
		}
	}
	for name, k := range cuts {
		t.Run(name, func(t *testing.T) {
			e, _ := NewEngine(p, "bed-9")
			var got []string
			feed(e, samples[:k+1], &got)
			b, err := json.Marshal(e.Snapshot())
			if err != nil {
				t.Fatal(err)
			}
			var st State
			if err := json.Unmarshal(b, &st); err != nil {
				t.Fatal(err)
			}
			r, err := Restore(p, st)
			if err != nil {
				t.Fatal(err)
			}
			if !reflect.DeepEqual(fmt.Sprint(r.Episodes(nil)), fmt.Sprint(e.Episodes(nil))) || r.Priority() != e.Priority() || r.Revision() != e.Revision() {
				t.Fatalf("restored engine differs:\n%v\n%v", r.Episodes(nil), e.Episodes(nil))
			}
			// The device resends the last 30 samples: all ignored.
			feed(r, samples[k-29:k+1], &got)
			if r.Ignored() != 30 {
				t.Errorf("Ignored() = %d after a resend of 30 samples", r.Ignored())
			}
			feed(r, samples[k+1:], &got)
			if strings.Join(got, "\n") != strings.Join(want, "\n") {
				for i := range want {
					if i >= len(got) || got[i] != want[i] {
						t.Fatalf("event %d after restore at sample %d:\n got %v\nwant %s", i, k, safe(got, i), want[i])
					}
				}
				t.Fatalf("%d events, want %d", len(got), len(want))
			}
		})
	}
}

func safe(s []string, i int) string {
	if i < len(s) {
		return s[i]
	}
	return "(none)"
}

func TestRestoreRejectsWhatWouldLoseAnEpisode(t *testing.T) {
	p := mustProfile(t, spo2LowProfile)
	e, _ := NewEngine(p, "bed-1")
	e.Eval(Sample{T: 0, SpO2: 88, Pulse: nan, PI: nan, SQI: nan}, nil)
	st := e.Snapshot()
	other := mustProfile(t, "name: other\nconditions:\n  - {kind: pulse_low, limit: 40, delay: 0s, priority: low}\n")
	if _, err := Restore(other, st); err == nil || !strings.Contains(err.Error(), "open episode") {
		t.Errorf("Restore into a profile without spo2_low: %v, want an open-episode error", err)
	}
	st.Version = 99
	if _, err := Restore(p, st); err == nil {
		t.Error("Restore accepted state version 99")
	}
	// A profile that gained a condition restores; the new one starts inactive.
	st.Version = StateVersion
	grown := mustProfile(t, spo2LowProfile+"  - {kind: pulse_low, limit: 40, delay: 0s, priority: low}\n")
	r, err := Restore(grown, st)
	if err != nil {
		t.Fatal(err)
	}
	if eps := r.Episodes(nil); len(eps) != 1 || eps[0].Phase != Pending || eps[0].OnsetS != 0 {
		t.Errorf("restored episodes %+v", eps)
	}
}

func TestEpisodeJSONNullsForNotYet(t *testing.T) {
	ep := Episode{ID: 3, Device: "d", Condition: "spo2_low", Kind: SpO2Low, Priority: PriorityMedium, Phase: Active,
		OnsetS: 1, AnnouncedS: 16, EscalatedS: nan, EndedS: nan, MinSpO2: 88, Limit: 90, Baseline: nan, AckedS: nan}
	b, err := json.Marshal(ep)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{`"escalated_s":null`, `"kind":"spo2_low"`, `"priority":"medium"`, `"phase":"active"`} {
		if !strings.Contains(string(b), want) {
			t.Errorf("%s lacks %s", b, want)
		}
	}
	var back Episode
	if err := json.Unmarshal(b, &back); err != nil {
		t.Fatal(err)
	}
	if fmt.Sprintf("%+v", back) != fmt.Sprintf("%+v", ep) {
		t.Errorf("round trip\n%+v\n%+v", back, ep)
	}
}

// One table of readable condition labels (issue 15): kind names map to
// their labels, a condition the profile named itself stays as it is.
func TestConditionLabel(t *testing.T) {
	for in, want := range map[string]string{"spo2_low": "SpO2 low", "device_clock_fault": "device clock fault",
		"signal_lost": "SpO2 signal lost", "pulse_high": "pulse rate high", "night_low": "night_low"} {
		if got := Label(in); got != want {
			t.Errorf("Label(%q) = %q, want %q", in, got, want)
		}
	}
}
