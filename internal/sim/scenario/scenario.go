package scenario

import (
	"cmp"
	"fmt"
	"hash/fnv"
	"math"
	"math/rand/v2"
	"slices"
	"time"
)

// Scenario is a fleet with scripted events over scenario time.
type Scenario struct {
	Name        string
	Description string
	// Duration is the scenario's length in scenario time; 0 = open-ended
	// (the run's own duration decides).
	Duration time.Duration
	// Speed is the default time compression: scenario seconds per wall
	// second; 0 = 1.
	Speed float64
	// Mode is the default data mode of the devices ("raw" or "summary");
	// "" = the caller's default.
	Mode string
	// RateHz is the default raw sample rate in hertz; 0 = the caller's default.
	RateHz  float64
	Devices []Device
}

// Device is one simulated device and the patient wearing it.
type Device struct {
	ID       string            // 1..64 characters of [A-Za-z0-9._-]
	Model    string            // hardware model sent in the introduction; "" = "sim-proto"
	Firmware string            // firmware version string; "" = "sim"
	Mode     string            // "raw", "summary" or "" (the scenario's)
	Labels   map[string]string // sent in the introduction (bed, home, ...)
	Patient  Patient
	Battery  Battery
	// Background are random events drawn from the run's seed on top of
	// the scripted ones.
	Background Background
	// Events are the scripted events, ordered by At.
	Events []Event
}

// Patient is the physiology at rest; events and a slow wander move it.
type Patient struct {
	SpO2Pct     float64 // baseline saturation, %, 50..100
	PulseBPM    float64 // baseline pulse rate, /min, 20..250
	PIPct       float64 // baseline infrared perfusion index, %, 0.02..20
	RespRateBPM float64 // breathing rate, /min, 0..60 (0 = no respiratory wander)
}

// Battery is the device's charge over scenario time.
type Battery struct {
	StartPct     float64 // charge at scenario time 0, %, 0..100
	DrainPctPerH float64 // discharge rate in % per hour of scenario time, 0..100; a flat battery takes the device offline
	StatusEveryS float64 // seconds of scenario time between status messages; 0 = 30
	TemperatureC float64 // device temperature reported in status messages; 0 = 33
	LinkQuality  float64 // radio link quality 0..1 reported in status; 0 = 0.9
}

// Background gives rates of random events per hour of scenario time.
type Background struct {
	DesaturationsPerH float64 // brief desaturations of 3..12 points
	SensorOffPerH     float64 // sensor-off spells of 10 s..2 min
	MotionPerH        float64 // motion bursts of 5 s..1 min
}

// Kind is what an event does.
type Kind int

// Event kinds.
const (
	// Desaturate ramps SpO2 down to To over Over, holds it for Hold and
	// ramps back over Recover (0 = Over).
	Desaturate Kind = iota + 1
	// Pulse moves the pulse rate to To the same way.
	Pulse
	// Perfusion moves the perfusion index to To the same way.
	Perfusion
	// SensorOff takes the finger out of the sensor for Hold.
	SensorOff
	// Motion shakes the sensor with Intensity 0..1 for Hold.
	Motion
	// Offline disconnects the device for Hold; it keeps sampling and
	// resends what it buffered when it comes back.
	Offline
	// Charge puts the device on its charger (offline, not worn) for Hold;
	// the battery is full afterwards.
	Charge
)

var kindNames = map[Kind]string{
	Desaturate: "desaturate", Pulse: "pulse", Perfusion: "perfusion",
	SensorOff: "sensor_off", Motion: "motion", Offline: "offline", Charge: "charge",
}

func (k Kind) String() string {
	if s, ok := kindNames[k]; ok {
		return s
	}
	return fmt.Sprintf("Kind(%d)", int(k))
}

// Event is a scripted or random change of one device's patient or link.
type Event struct {
	At        time.Duration // scenario time of the start
	Kind      Kind
	To        float64       // target value (Desaturate: %, Pulse: /min, Perfusion: %)
	Over      time.Duration // ramp from the baseline to To
	Hold      time.Duration // time at To, or the length of a spell
	Recover   time.Duration // ramp back; 0 = Over
	Intensity float64       // Motion only, 0..1
}

// End is when the event stops having any effect.
func (e Event) End() time.Duration {
	switch e.Kind {
	case Desaturate, Pulse, Perfusion:
		r := e.Recover
		if r == 0 {
			r = e.Over
		}
		return e.At + e.Over + e.Hold + r
	}
	return e.At + e.Hold
}

// weight is how far a ramp event has moved from the baseline to To at t, 0..1.
func (e Event) weight(t time.Duration) float64 {
	d := t - e.At
	if d < 0 {
		return 0
	}
	if d < e.Over {
		return float64(d) / float64(e.Over)
	}
	d -= e.Over
	if d < e.Hold {
		return 1
	}
	d -= e.Hold
	r := e.Recover
	if r == 0 {
		r = e.Over
	}
	if d < r {
		return 1 - float64(d)/float64(r)
	}
	return 0
}

// State is what a device and its patient are doing at one scenario time.
type State struct {
	SpO2Pct     float64
	PulseBPM    float64
	PIPct       float64
	RespRateBPM float64
	Motion      float64 // 0 (still) .. 1 (vigorous)
	SensorOff   bool
	Offline     bool // the device is disconnected (offline event, on its charger or battery flat)
	DeviceOff   bool // the device is switched off (on its charger or battery flat) and samples nothing
	BatteryPct  float64
}

// Seed derives a device's seed from the run's seed and the device's id, so a
// device keeps its patient when the fleet around it changes.
func Seed(runSeed uint64, id string) uint64 {
	h := fnv.New64a()
	var b [8]byte
	for i := range b {
		b[i] = byte(runSeed >> (8 * i))
	}
	h.Write(b[:])
	h.Write([]byte(id))
	return h.Sum64()
}

// Track evaluates one device over scenario time. Not safe for concurrent use.
type Track struct {
	dev    *Device
	events []Event // scripted and background, ordered by At
	first  int     // events before first have ended
	// chargeEnd is the latest end of a Charge event before first (-1 = none).
	chargeEnd time.Duration
	// wander phases (radians) and periods (seconds)
	ph [4]float64
}

// NewTrack returns a track of d whose background events are drawn from seed
// over [0, horizon) of scenario time.
func NewTrack(d *Device, seed uint64, horizon time.Duration) *Track {
	rng := rand.New(rand.NewPCG(seed, 0x5ce9a71))
	t := &Track{dev: d, chargeEnd: -1}
	for i := range t.ph {
		t.ph[i] = 2 * math.Pi * rng.Float64()
	}
	t.events = append(t.events, d.Events...)
	t.events = append(t.events, background(rng, d, horizon)...)
	slices.SortStableFunc(t.events, func(a, b Event) int { return cmp.Compare(a.At, b.At) })
	return t
}

// Events returns the scripted and background events of the track, ordered
// by start time. The slice is the track's own; do not modify it.
func (t *Track) Events() []Event { return t.events }

// Device returns the device the track follows.
func (t *Track) Device() *Device { return t.dev }

// poisson draws event start times of a Poisson process of rate perH per
// hour over [0, horizon).
func poisson(rng *rand.Rand, perH float64, horizon time.Duration, each func(at time.Duration)) {
	if perH <= 0 || horizon <= 0 {
		return
	}
	meanGap := float64(time.Hour) / perH
	at := time.Duration(rng.ExpFloat64() * meanGap)
	for at < horizon {
		each(at)
		at += time.Duration(rng.ExpFloat64() * meanGap)
	}
}

func uniform(rng *rand.Rand, lo, hi float64) float64 { return lo + (hi-lo)*rng.Float64() }

func seconds(s float64) time.Duration { return time.Duration(s * float64(time.Second)) }

func background(rng *rand.Rand, d *Device, horizon time.Duration) []Event {
	var out []Event
	b := d.Background
	poisson(rng, b.DesaturationsPerH, horizon, func(at time.Duration) {
		out = append(out, Event{At: at, Kind: Desaturate,
			To:   d.Patient.SpO2Pct - uniform(rng, 3, 12),
			Over: seconds(uniform(rng, 15, 60)), Hold: seconds(uniform(rng, 10, 90)),
			Recover: seconds(uniform(rng, 15, 45))})
	})
	poisson(rng, b.SensorOffPerH, horizon, func(at time.Duration) {
		out = append(out, Event{At: at, Kind: SensorOff, Hold: seconds(uniform(rng, 10, 120))})
	})
	poisson(rng, b.MotionPerH, horizon, func(at time.Duration) {
		out = append(out, Event{At: at, Kind: Motion, Hold: seconds(uniform(rng, 5, 60)),
			Intensity: uniform(rng, 0.3, 1)})
	})
	return out
}

// At returns the state at scenario time t. Calls should come with t not
// decreasing (the track skips events that have ended); an earlier t is
// still answered correctly but from a rescan.
func (t *Track) At(at time.Duration) State {
	p := t.dev.Patient
	s := at.Seconds()
	// Slow wander: two incommensurate sines per quantity (common practice
	// for test signals, not a physiological model).
	spo2 := p.SpO2Pct + 0.5*math.Sin(2*math.Pi*s/317+t.ph[0]) + 0.3*math.Sin(2*math.Pi*s/71+t.ph[1])
	pulse := p.PulseBPM + 3*math.Sin(2*math.Pi*s/241+t.ph[2]) + 1.5*math.Sin(2*math.Pi*s/37+t.ph[3])
	pi := p.PIPct * (1 + 0.1*math.Sin(2*math.Pi*s/193+t.ph[1]))
	st := State{SpO2Pct: math.Min(spo2, 100), PulseBPM: pulse, PIPct: pi, RespRateBPM: p.RespRateBPM}

	if t.first > 0 && at < t.events[t.first-1].End() {
		t.first, t.chargeEnd = 0, -1 // went back in time
	}
	for t.first < len(t.events) && t.events[t.first].End() <= at {
		if e := t.events[t.first]; e.Kind == Charge {
			t.chargeEnd = max(t.chargeEnd, e.End())
		}
		t.first++
	}
	lastCharge := t.chargeEnd
	for _, e := range t.events[t.first:] {
		if e.At > at {
			break
		}
		if at >= e.End() {
			if e.Kind == Charge {
				lastCharge = max(lastCharge, e.End())
			}
			continue
		}
		w := e.weight(at)
		switch e.Kind {
		case Desaturate:
			st.SpO2Pct = math.Min(st.SpO2Pct, spo2+(e.To-spo2)*w)
		case Pulse:
			st.PulseBPM = pulse + (e.To-pulse)*w
		case Perfusion:
			st.PIPct = pi + (e.To-pi)*w
		case SensorOff:
			st.SensorOff = true
		case Motion:
			st.Motion = math.Max(st.Motion, e.Intensity)
		case Offline:
			st.Offline = true
		case Charge:
			st.Offline, st.SensorOff, st.DeviceOff = true, true, true
		}
	}
	b := t.dev.Battery
	if lastCharge >= 0 {
		st.BatteryPct = 100 - b.DrainPctPerH*(at-lastCharge).Hours()
	} else {
		st.BatteryPct = b.StartPct - b.DrainPctPerH*at.Hours()
	}
	if st.BatteryPct <= 0 {
		st.BatteryPct = 0
		st.Offline, st.SensorOff, st.DeviceOff = true, true, true
	}
	return st
}

// Generic returns an unscripted fleet of n devices named prefix-0001 and
// so on, each with a patient drawn from seed: baseline SpO2 93..99 %, pulse
// 55..100 /min, perfusion index 0.5..6 % (log-uniform), breathing 10..20
// /min, a battery at 40..100 % draining 1..4 % per hour, and a couple of
// random desaturations, sensor-off spells and motion bursts per hour.
func Generic(n int, prefix string, seed uint64) *Scenario {
	sc := &Scenario{Name: "generic", Description: fmt.Sprintf("%d unscripted devices", n)}
	rng := rand.New(rand.NewPCG(seed, 0x6e1e71c))
	width := max(4, len(fmt.Sprint(n)))
	for i := 1; i <= n; i++ {
		sc.Devices = append(sc.Devices, Device{
			ID: fmt.Sprintf("%s-%0*d", prefix, width, i),
			Patient: Patient{
				SpO2Pct:     math.Round(uniform(rng, 93, 99)),
				PulseBPM:    math.Round(uniform(rng, 55, 100)),
				PIPct:       math.Exp(uniform(rng, math.Log(0.5), math.Log(6))),
				RespRateBPM: math.Round(uniform(rng, 10, 20)),
			},
			Battery:    Battery{StartPct: math.Round(uniform(rng, 40, 100)), DrainPctPerH: uniform(rng, 1, 4)},
			Background: Background{DesaturationsPerH: 2, SensorOffPerH: 0.5, MotionPerH: 3},
		})
	}
	return sc
}
