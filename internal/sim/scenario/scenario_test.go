package scenario

import (
	"strings"
	"testing"
	"time"
)

const minimal = `
name: t
duration: 1h
devices:
  - id: bed-1
  - id: bed-2
    patient: {spo2_pct: 94}
events:
  - {at: "00:12:00", device: bed-1, desaturate: {to: 84, over: 40s, hold: 90s}}
  - {at: "00:30", devices: [bed-1, bed-2], sensor_off: {for: 2m}}
`

func TestParseMinimal(t *testing.T) {
	sc, err := Parse([]byte(minimal))
	if err != nil {
		t.Fatal(err)
	}
	if len(sc.Devices) != 2 || sc.Devices[1].Patient.SpO2Pct != 94 || sc.Devices[1].Patient.PulseBPM != 72 {
		t.Fatalf("devices %+v: want bed-2 at 94 %% with the default pulse", sc.Devices)
	}
	ev := sc.Devices[0].Events
	if len(ev) != 2 || ev[0].Kind != Desaturate || ev[0].At != 12*time.Minute || ev[1].At != 30*time.Minute {
		t.Fatalf("bed-1 events %+v", ev)
	}
	if ev[0].End() != 12*time.Minute+40*time.Second+90*time.Second+40*time.Second {
		t.Errorf("desaturation ends at %v, want onset + over + hold + recover (= over)", ev[0].End())
	}
}

func TestParseErrorsNameKeyPathAndBound(t *testing.T) {
	for _, tc := range []struct{ name, yaml, want string }{
		{"unknown top-level key", "name: t\ndevices: [{id: a}]\nspeeed: 3\n", "speeed: unknown key (want one of"},
		{"unknown nested key", "name: t\ndevices: [{id: a, patient: {spo2: 90}}]\n", "devices[0].patient.spo2: unknown key"},
		{"saturation bound", "name: t\ndevices: [{id: a, patient: {spo2_pct: 130}}]\n", "devices[0].patient.spo2_pct: 130 out of range (want 50..100)"},
		{"event target bound", "name: t\ndevices: [{id: a}]\nevents: [{at: 1m, device: a, desaturate: {to: 20}}]\n", "events[0].desaturate.to: 20 out of range (want 50..100)"},
		{"bad time", "name: t\ndevices: [{id: a}]\nevents: [{at: 25:99, device: a, motion: {for: 1m}}]\n", "events[0].at:"},
		{"unknown device", "name: t\ndevices: [{id: a}]\nevents: [{at: 1m, device: b, motion: {for: 1m}}]\n", `events[0].device: "b" is not a device`},
		{"two kinds", "name: t\ndevices: [{id: a}]\nevents: [{at: 1m, device: a, motion: {for: 1m}, offline: {for: 1m}}]\n", "events[0].offline: an event does one thing"},
		{"no kind", "name: t\ndevices: [{id: a}]\nevents: [{at: 1m, device: a}]\n", "events[0]: no event kind"},
		{"missing for", "name: t\ndevices: [{id: a}]\nevents: [{at: 1m, device: a, sensor_off: {}}]\n", "events[0].sensor_off.for: required key missing"},
		{"after the end", "name: t\nduration: 1h\ndevices: [{id: a}]\nevents: [{at: 2h, device: a, offline: {for: 1m}}]\n", "events[0].at: 2h0m0s is after the scenario's duration"},
		{"bad id", "name: t\ndevices: [{id: 'bed 1'}]\n", `devices[0].id: "bed 1", want 1..64 characters`},
		{"duplicate id", "name: t\ndevices: [{id: a}, {id: a}]\n", `devices[1].id: "a" already used by devices[0]`},
		{"no devices", "name: t\n", "devices: required key missing"},
		{"rate bound", "name: t\nrate_hz: 5\ndevices: [{id: a}]\n", "rate_hz: 5 out of range (want 25..1000)"},
		{"mode", "name: t\ndevices: [{id: a, mode: ppg}]\n", `devices[0].mode: "ppg", want raw or summary`},
		{"nine labels", "name: t\ndevices: [{id: a, labels: {a: 1, b: 2, c: 3, d: 4, e: 5, f: 6, g: 7, h: 8, i: 9}}]\n", "devices[0].labels: 9 labels, want at most 8"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := Parse([]byte(tc.yaml))
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("error %v, want it to contain %q", err, tc.want)
			}
		})
	}
}

func TestParseOffset(t *testing.T) {
	for in, want := range map[string]time.Duration{
		"00:12:00": 12 * time.Minute, "01:30": 90 * time.Minute, "90s": 90 * time.Second,
		"1h30m": 90 * time.Minute, "2d": 48 * time.Hour, "2d 03:00": 51 * time.Hour, "1d4h": 28 * time.Hour,
		"00:00:01.5": 1500 * time.Millisecond,
	} {
		got, err := ParseOffset(in)
		if err != nil || got != want {
			t.Errorf("ParseOffset(%q) = %v, %v; want %v", in, got, err, want)
		}
	}
	for _, bad := range []string{"25:99", "soon", "1:2:3:4", "-"} {
		if _, err := ParseOffset(bad); err == nil {
			t.Errorf("ParseOffset(%q) accepted", bad)
		}
	}
}

func TestTrackFollowsEvents(t *testing.T) {
	d := DefaultDevice()
	d.Patient.SpO2Pct = 96
	d.Battery = Battery{StartPct: 50, DrainPctPerH: 10}
	d.Events = []Event{
		{At: time.Minute, Kind: Desaturate, To: 86, Over: 20 * time.Second, Hold: 30 * time.Second},
		{At: 10 * time.Minute, Kind: Motion, Hold: time.Minute, Intensity: 0.7},
		{At: 2 * time.Hour, Kind: Charge, Hold: time.Hour},
	}
	tr := NewTrack(&d, 42, 0)
	// Half-way down the ramp: the baseline (96 +- 0.8 wander) half-way to 86.
	if st := tr.At(time.Minute + 10*time.Second); st.SpO2Pct < 90.5 || st.SpO2Pct > 91.5 {
		t.Errorf("half-way down: %v %%, want about 91", st.SpO2Pct)
	}
	if st := tr.At(time.Minute + 30*time.Second); st.SpO2Pct != 86 {
		t.Errorf("holding: %v %%, want 86", st.SpO2Pct)
	}
	if st := tr.At(5 * time.Minute); st.SpO2Pct < 95 || st.SpO2Pct > 97 {
		t.Errorf("recovered: %v %%, want about 96", st.SpO2Pct)
	}
	if st := tr.At(10*time.Minute + 30*time.Second); st.Motion != 0.7 {
		t.Errorf("motion %v, want 0.7", st.Motion)
	}
	if st := tr.At(time.Hour); st.BatteryPct != 40 {
		t.Errorf("battery after 1 h at 10 %%/h from 50: %v, want 40", st.BatteryPct)
	}
	if st := tr.At(2*time.Hour + time.Minute); !st.DeviceOff || !st.Offline {
		t.Errorf("on the charger: %+v, want off and offline", st)
	}
	if st := tr.At(3*time.Hour + 30*time.Minute); st.DeviceOff || st.BatteryPct != 95 {
		t.Errorf("30 min after charging: %+v, want on at 95 %%", st)
	}
	// Going back in time is answered from a rescan.
	if st := tr.At(time.Minute + 30*time.Second); st.SpO2Pct != 86 {
		t.Errorf("after rewinding: %v %%, want 86", st.SpO2Pct)
	}
}

func TestGenericIsSeedDerived(t *testing.T) {
	a, b, c := Generic(50, "x", 1), Generic(50, "x", 1), Generic(50, "x", 2)
	same, differ := true, false
	for i := range a.Devices {
		if a.Devices[i].Patient != b.Devices[i].Patient {
			same = false
		}
		if a.Devices[i].Patient != c.Devices[i].Patient {
			differ = true
		}
		p := a.Devices[i].Patient
		if p.SpO2Pct < 93 || p.SpO2Pct > 99 || p.PulseBPM < 55 || p.PulseBPM > 100 || p.PIPct < 0.5 || p.PIPct > 6 {
			t.Errorf("patient %d out of the documented ranges: %+v", i, p)
		}
	}
	if !same || !differ {
		t.Errorf("same seed same fleet %v, other seed other fleet %v", same, differ)
	}
	if a.Devices[0].ID != "x-0001" {
		t.Errorf("first id %q, want x-0001", a.Devices[0].ID)
	}
	// Background events over a day: about 2 desaturations per hour.
	tr := NewTrack(&a.Devices[0], 9, 24*time.Hour)
	n := 0
	for _, e := range tr.Events() {
		if e.Kind == Desaturate {
			n++
		}
	}
	if n < 24 || n > 80 {
		t.Errorf("%d background desaturations in 24 h at 2/h, want about 48", n)
	}
}

// Whatever the input, Parse either rejects it with a "scenario:" error or
// returns a fleet whose ids are valid and unique and whose events belong to
// it; it never panics.
func FuzzParse(f *testing.F) {
	f.Add([]byte(minimal))
	f.Add([]byte("name: t\ndevices: [{id: a}]\nevents: [{at: 1m, device: a, motion: {for: 1m}}]\n"))
	f.Add([]byte("name: t\ndevices: [{id: a, labels: {bed: 1}}]\ndefaults: {patient: {spo2_pct: 90}}\n"))
	f.Add([]byte("{"))
	f.Fuzz(func(t *testing.T, data []byte) {
		sc, err := Parse(data)
		if err != nil {
			if !strings.HasPrefix(err.Error(), "scenario: ") {
				t.Fatalf("error without prefix: %v", err)
			}
			return
		}
		seen := map[string]bool{}
		for _, d := range sc.Devices {
			if !idRE.MatchString(d.ID) || seen[d.ID] {
				t.Fatalf("bad or duplicate id %q", d.ID)
			}
			seen[d.ID] = true
			tr := NewTrack(&d, 1, time.Hour)
			st := tr.At(30 * time.Minute)
			if st.SpO2Pct > 100 || st.BatteryPct < 0 {
				t.Fatalf("state out of range: %+v", st)
			}
		}
	})
}
