package alarms

import (
	"encoding/json"
	"math"
	"testing"
)

const clockTestProfile = `name: clock-test
conditions:
  - kind: spo2_low
    limit: 90
    delay: 15s
    priority: medium
`

// device_clock_fault follows SetClockFault like device_offline follows
// SetOffline: present from the first report, announced after its delay (the
// default condition's 10 s when the profile has none), cleared by a trusted
// report; it never moves the time of the last evaluated sample.
func TestClockFaultDefaultConditionAndLifecycle(t *testing.T) {
	p, err := ParseProfile([]byte(clockTestProfile))
	if err != nil {
		t.Fatal(err)
	}
	e, _ := NewEngine(p, "bed-1")
	var evs []Event
	emit := func(ev Event) { evs = append(evs, ev) }
	e.Eval(Sample{T: 100, SpO2: 97}, emit)
	for t := 101.0; t <= 112; t++ {
		e.SetClockFault(true, t, emit)
	}
	if e.LastT() != 100 {
		t.Errorf("LastT %v after clock fault reports, want 100 (the last sample)", e.LastT())
	}
	eps := e.Episodes(nil)
	if len(eps) != 1 || eps[0].Condition != "device_clock_fault" || eps[0].Phase != Active || eps[0].AnnouncedS != 111 ||
		eps[0].Priority != PriorityMedium || !eps[0].Kind.Technical() {
		t.Fatalf("episodes %+v, want device_clock_fault announced at 111 (onset 101 + the default 10 s delay), medium", eps)
	}
	if DeviceClockFault.Label() != "device clock fault" {
		t.Errorf("label %q", DeviceClockFault.Label())
	}
	// Snapshot and restore keep the fault.
	b, _ := json.Marshal(e.Snapshot())
	var st State
	if err := json.Unmarshal(b, &st); err != nil {
		t.Fatal(err)
	}
	r, err := Restore(p, st)
	if err != nil {
		t.Fatal(err)
	}
	if !r.ClockFault() || len(r.Episodes(nil)) != 1 {
		t.Fatalf("restored: fault %v episodes %+v", r.ClockFault(), r.Episodes(nil))
	}
	evs = evs[:0]
	r.SetClockFault(false, 113, emit)
	if len(evs) != 1 || evs[0].Type != EventEnded || len(r.Episodes(nil)) != 0 {
		t.Errorf("trusted again: events %+v, want device_clock_fault ended", evs)
	}
	// A profile may set its own device_clock_fault; then no default is added.
	q, err := ParseProfile([]byte(clockTestProfile + "  - kind: device_clock_fault\n    delay: 30s\n    priority: high\n"))
	if err != nil {
		t.Fatal(err)
	}
	e2, _ := NewEngine(q, "bed-2")
	for t := 0.0; t <= 30; t++ {
		e2.SetClockFault(true, t, nil)
	}
	if eps := e2.Episodes(nil); len(eps) != 1 || eps[0].AnnouncedS != 30 || eps[0].Priority != PriorityHigh {
		t.Errorf("own condition: %+v, want one announced at 30 s, high", eps)
	}
	if _, err := ParseProfile([]byte(clockTestProfile + "  - kind: device_clock_fault\n    limit: 3\n")); err == nil {
		t.Error("device_clock_fault with a limit parsed, want an error naming the field")
	}
}

// An engine restored with a clock far in the future (a bad device time that
// got in before the policy) is rewound: later samples are evaluated again,
// a pending episode is announced within its delay of the rewind, and a pause
// that starts in the future ends.
func TestRewindUnfreezesAFutureClock(t *testing.T) {
	p, _ := ParseProfile([]byte(clockTestProfile))
	e, _ := NewEngine(p, "bed-1")
	future := 1e9 + 300*86400.0
	e.Eval(Sample{T: future, SpO2: 85}, nil) // onset in the future
	if err := e.Pause("nurse", future, future+60, nil); err != nil {
		t.Fatal(err)
	}
	now := 1e9
	e.Eval(Sample{T: now, SpO2: 80}, nil)
	if e.Ignored() != 1 {
		t.Fatalf("before the rewind a sample at now is ignored: ignored %d", e.Ignored())
	}
	if !e.Rewind(now, nil) || e.LastT() != now {
		t.Fatalf("rewind: LastT %v, want %v", e.LastT(), now)
	}
	if _, _, paused := e.Paused(now + 1); paused {
		t.Error("a pause that started in the future survived the rewind")
	}
	for s := now + 1; s <= now+15; s++ {
		e.Eval(Sample{T: s, SpO2: 80}, nil)
	}
	eps := e.Episodes(nil)
	if len(eps) != 1 || eps[0].Phase != Active || eps[0].OnsetS != now || math.Abs(eps[0].AnnouncedS-(now+15)) > 1e-9 {
		t.Errorf("after the rewind: %+v, want spo2_low onset at the rewind, announced 15 s later", eps)
	}
	if e.Rewind(e.LastT(), nil) {
		t.Error("a rewind to the engine's own time reported a change")
	}
}
