package scenarios

import (
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim/scenario"
)

func TestShippedScenariosParse(t *testing.T) {
	names := Names()
	if len(names) < 3 {
		t.Fatalf("shipped scenarios %v, want demo, home-week and ward-night", names)
	}
	for _, n := range names {
		sc, err := Load(n)
		if err != nil {
			t.Fatalf("%s: %v", n, err)
		}
		if sc.Name != n {
			t.Errorf("%s: name %q, want the file name", n, sc.Name)
		}
	}
}

func find(t *testing.T, sc *scenario.Scenario, id string) *scenario.Device {
	t.Helper()
	for i := range sc.Devices {
		if sc.Devices[i].ID == id {
			return &sc.Devices[i]
		}
	}
	t.Fatalf("%s has no device %s", sc.Name, id)
	return nil
}

// The ward night is what its comments say: 12 beds, bed 3 at 84 % after
// 00:12:00 + 40 s, bed 7's sensor off from 01:30 for 2 min, bed 12 flat
// near 4 h (24 % at 6 %/h) and on its charger from 04:30.
func TestWardNightScript(t *testing.T) {
	sc, err := Load("ward-night")
	if err != nil {
		t.Fatal(err)
	}
	if len(sc.Devices) != 12 || sc.Duration != 8*time.Hour {
		t.Fatalf("%d devices over %v, want 12 over 8h", len(sc.Devices), sc.Duration)
	}
	bed3 := scenario.NewTrack(find(t, sc, "larkspur-bed-03"), 1, 0) // no background events
	st := bed3.At(12*time.Minute + 40*time.Second + 45*time.Second)
	if st.SpO2Pct != 84 {
		t.Errorf("bed 3 during its desaturation: %v %%, want 84", st.SpO2Pct)
	}
	bed7 := scenario.NewTrack(find(t, sc, "larkspur-bed-07"), 1, 0)
	if !bed7.At(91*time.Minute).SensorOff || bed7.At(93*time.Minute).SensorOff {
		t.Error("bed 7 sensor-off spell is not 01:30:00 + 2 min")
	}
	bed12 := scenario.NewTrack(find(t, sc, "larkspur-bed-12"), 1, 0)
	if st := bed12.At(3*time.Hour + 50*time.Minute); st.DeviceOff || st.BatteryPct <= 0 {
		t.Errorf("bed 12 at 03:50: %+v, want still on", st)
	}
	if st := bed12.At(4*time.Hour + 10*time.Minute); !st.DeviceOff {
		t.Errorf("bed 12 at 04:10: %+v, want battery flat", st)
	}
	if st := bed12.At(5*time.Hour + 20*time.Minute); st.DeviceOff || st.BatteryPct < 99 {
		t.Errorf("bed 12 after charging: %+v, want on with a full battery", st)
	}
}

// The demo's bed 3 must be below 90 % from well before 45 s so an alarm
// with a 15 s delay is announced within about a minute.
func TestDemoDesaturatesEarly(t *testing.T) {
	sc, err := Load("demo")
	if err != nil {
		t.Fatal(err)
	}
	bed3 := find(t, sc, "larkspur-bed-03")
	if bed3.Mode != "summary" {
		t.Errorf("bed 3 mode %q, want summary (device-computed values, no estimator in the way)", bed3.Mode)
	}
	tr := scenario.NewTrack(bed3, 1, time.Hour)
	for s := 30; s <= 150; s += 5 {
		if st := tr.At(time.Duration(s) * time.Second); st.SpO2Pct >= 90 || st.SensorOff || st.Motion > 0 {
			t.Fatalf("bed 3 at %d s: %+v, want below 90 %% with a clean signal from 30 s to 150 s", s, st)
		}
	}
}

func TestHomeWeekChargesDaily(t *testing.T) {
	sc, err := Load("home-week")
	if err != nil {
		t.Fatal(err)
	}
	tr := scenario.NewTrack(find(t, sc, "home-aldergate"), 1, 0)
	for day := 0; day < 7; day++ {
		night := time.Duration(day)*24*time.Hour + 4*time.Hour
		noon := time.Duration(day)*24*time.Hour + 14*time.Hour
		if st := tr.At(night); st.Offline {
			t.Errorf("night %d: offline", day+1)
		}
		if st := tr.At(noon); !st.DeviceOff {
			t.Errorf("day %d noon: not on the charger", day+1)
		}
	}
	dun := scenario.NewTrack(find(t, sc, "home-dunmore"), 1, 0)
	if st := dun.At(4*24*time.Hour + 3*time.Hour); !st.DeviceOff || st.BatteryPct != 0 {
		t.Errorf("Dunmore in night 5: %+v, want a flat battery", st)
	}
}
