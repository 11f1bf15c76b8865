package scenario

import (
	"cmp"
	"errors"
	"fmt"
	"maps"
	"math"
	"os"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"time"

	"go.yaml.in/yaml/v3"

	"github.com/pulsefleet/pulsefleet/internal/yamlwalk"
)

// Bounds of the file format (docs/scenarios.md).
const (
	MaxDevices  = 10000
	MaxDuration = 31 * 24 * time.Hour
	MaxEvents   = 100000
)

// ParseFile reads a scenario file.
func ParseFile(path string) (*Scenario, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("read scenario: %w", err)
	}
	sc, err := Parse(data)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return sc, nil
}

// Parse reads a scenario in the YAML format of docs/scenarios.md. Unknown
// keys and values out of bounds are errors naming the key path (for example
// "events[3].desaturate.to") and the bound.
func Parse(data []byte) (*Scenario, error) {
	var doc yaml.Node
	if err := yaml.Unmarshal(data, &doc); err != nil {
		return nil, fmt.Errorf("scenario: %w", err)
	}
	if doc.Kind != yaml.DocumentNode || len(doc.Content) == 0 {
		return nil, errors.New("scenario: empty document")
	}
	p := parser{}
	sc := p.scenario(doc.Content[0])
	if p.err != nil {
		return nil, p.err
	}
	return sc, nil
}

// parser keeps the first error; later calls become no-ops.
type parser struct{ err error }

func (p *parser) failf(n *yaml.Node, path, format string, args ...any) {
	if p.err != nil {
		return
	}
	e := yamlwalk.Errorf(path, format, args...)
	if n != nil {
		e.Line = n.Line
	}
	p.err = fmt.Errorf("scenario: %w", e)
}

// fields walks a mapping, calling each handler by key; unknown keys are
// errors naming the known ones.
func (p *parser) fields(n *yaml.Node, path string, handlers map[string]func(v *yaml.Node, path string)) map[string]bool {
	seen := map[string]bool{}
	if p.err != nil {
		return seen
	}
	if n.Kind != yaml.MappingNode {
		p.failf(n, path, "want a mapping of keys")
		return seen
	}
	p.walk(n, path, func(key string, v *yaml.Node, kp string) error {
		h, ok := handlers[key]
		if !ok {
			keys := slices.Sorted(maps.Keys(handlers))
			return keyErr(n, key, kp, "unknown key (want one of %s)", strings.Join(keys, ", "))
		}
		seen[key] = true
		h(v, kp)
		return p.err
	})
	return seen
}

// walk runs yamlwalk.Mapping over n, keeping its first error as the
// parser's (fn returns p.err to stop the walk at a handler's failure).
func (p *parser) walk(n *yaml.Node, path string, fn func(key string, v *yaml.Node, path string) error) {
	if err := yamlwalk.Mapping(n, path, fn); err != nil && p.err == nil {
		p.err = fmt.Errorf("scenario: %w", err)
	}
}

// keyErr is an error about key itself (not its value), at the key's line.
func keyErr(n *yaml.Node, key, path, format string, args ...any) error {
	e := yamlwalk.Errorf(path, format, args...)
	if k := yamlwalk.Key(n, key); k != nil {
		e.Line = k.Line
	}
	return e
}

func (p *parser) str(n *yaml.Node, path string, maxLen int) string {
	if n.Kind != yaml.ScalarNode {
		p.failf(n, path, "want a string")
		return ""
	}
	if len(n.Value) > maxLen {
		p.failf(n, path, "%d characters, want at most %d", len(n.Value), maxLen)
	}
	return n.Value
}

func (p *parser) num(n *yaml.Node, path string, lo, hi float64) float64 {
	if n.Kind != yaml.ScalarNode {
		p.failf(n, path, "want a number")
		return 0
	}
	v, err := strconv.ParseFloat(n.Value, 64)
	if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
		p.failf(n, path, "%q is not a number (want %g..%g)", n.Value, lo, hi)
		return 0
	}
	if v < lo || v > hi {
		p.failf(n, path, "%g out of range (want %g..%g)", v, lo, hi)
	}
	return v
}

var clockRE = regexp.MustCompile(`^(?:(\d+)d\s*)?(\d{1,3}):(\d{2})(?::(\d{2}(?:\.\d+)?))?$`)
var daysRE = regexp.MustCompile(`^(\d+)d\s*(.*)$`)

// ParseOffset reads a scenario time: a clock offset "HH:MM" or "HH:MM:SS"
// (hours, minutes, seconds since the scenario started), optionally after a
// day count ("2d 03:00"), or a Go duration with an optional day count
// ("90s", "12m", "1h30m", "3d", "2d4h").
func ParseOffset(s string) (time.Duration, error) {
	s = strings.TrimSpace(s)
	if m := clockRE.FindStringSubmatch(s); m != nil {
		days, _ := strconv.Atoi(m[1])
		h, _ := strconv.Atoi(m[2])
		mi, _ := strconv.Atoi(m[3])
		var sec float64
		if m[4] != "" {
			sec, _ = strconv.ParseFloat(m[4], 64)
		}
		if mi >= 60 || sec >= 60 {
			return 0, fmt.Errorf("%q: minutes and seconds must be below 60", s)
		}
		return time.Duration(days)*24*time.Hour + time.Duration(h)*time.Hour +
			time.Duration(mi)*time.Minute + time.Duration(sec*float64(time.Second)), nil
	}
	var d time.Duration
	if m := daysRE.FindStringSubmatch(s); m != nil {
		days, err := strconv.Atoi(m[1])
		if err != nil || days > 366 {
			return 0, fmt.Errorf("%q: bad day count", s)
		}
		d = time.Duration(days) * 24 * time.Hour
		s = m[2]
		if s == "" {
			return d, nil
		}
	}
	g, err := time.ParseDuration(s)
	if err != nil {
		return 0, fmt.Errorf("%q is not a time (want HH:MM[:SS], e.g. 00:12:00, or a duration such as 90s, 12m, 2d4h)", s)
	}
	return d + g, nil
}

func (p *parser) dur(n *yaml.Node, path string, lo, hi time.Duration) time.Duration {
	if n.Kind != yaml.ScalarNode {
		p.failf(n, path, "want a time such as 90s or 00:12:00")
		return 0
	}
	d, err := ParseOffset(n.Value)
	if err != nil {
		p.failf(n, path, "%v", err)
		return 0
	}
	if d < lo || d > hi {
		p.failf(n, path, "%v out of range (want %v..%v)", d, lo, hi)
	}
	return d
}

var idRE = regexp.MustCompile(`^[A-Za-z0-9._-]{1,64}$`)

func (p *parser) mode(n *yaml.Node, path string) string {
	s := p.str(n, path, 16)
	if p.err == nil && s != "raw" && s != "summary" {
		p.failf(n, path, "%q, want raw or summary", s)
	}
	return s
}

func (p *parser) labels(n *yaml.Node, path string, into map[string]string) {
	if n.Kind != yaml.MappingNode {
		p.failf(n, path, "want a mapping of label: value")
		return
	}
	p.walk(n, path, func(key string, v *yaml.Node, kp string) error {
		if len(key) < 1 || len(key) > 32 {
			return keyErr(n, key, kp, "label key of %d characters, want 1..32", len(key))
		}
		into[key] = p.str(v, kp, 64)
		return p.err
	})
	if p.err == nil && len(into) > 8 {
		p.failf(n, path, "%d labels, want at most 8", len(into))
	}
}

// device applies the keys of a device (or of defaults) onto d.
func (p *parser) device(n *yaml.Node, path string, d *Device, withID bool) map[string]bool {
	h := map[string]func(*yaml.Node, string){
		"model":    func(v *yaml.Node, kp string) { d.Model = p.str(v, kp, 64) },
		"firmware": func(v *yaml.Node, kp string) { d.Firmware = p.str(v, kp, 64) },
		"mode":     func(v *yaml.Node, kp string) { d.Mode = p.mode(v, kp) },
		"labels": func(v *yaml.Node, kp string) {
			m := make(map[string]string, len(d.Labels))
			for k, x := range d.Labels {
				m[k] = x
			}
			p.labels(v, kp, m)
			d.Labels = m
		},
		"patient": func(v *yaml.Node, kp string) {
			pt := &d.Patient
			p.fields(v, kp, map[string]func(*yaml.Node, string){
				"spo2_pct":      func(v *yaml.Node, kp string) { pt.SpO2Pct = p.num(v, kp, 50, 100) },
				"pulse_bpm":     func(v *yaml.Node, kp string) { pt.PulseBPM = p.num(v, kp, 20, 250) },
				"pi_pct":        func(v *yaml.Node, kp string) { pt.PIPct = p.num(v, kp, 0.02, 20) },
				"resp_rate_bpm": func(v *yaml.Node, kp string) { pt.RespRateBPM = p.num(v, kp, 0, 60) },
			})
		},
		"battery": func(v *yaml.Node, kp string) {
			b := &d.Battery
			p.fields(v, kp, map[string]func(*yaml.Node, string){
				"start_pct":       func(v *yaml.Node, kp string) { b.StartPct = p.num(v, kp, 0, 100) },
				"drain_pct_per_h": func(v *yaml.Node, kp string) { b.DrainPctPerH = p.num(v, kp, 0, 100) },
				"status_every": func(v *yaml.Node, kp string) {
					b.StatusEveryS = p.dur(v, kp, time.Second, time.Hour).Seconds()
				},
				"temperature_c": func(v *yaml.Node, kp string) { b.TemperatureC = p.num(v, kp, -40, 125) },
				"link_quality":  func(v *yaml.Node, kp string) { b.LinkQuality = p.num(v, kp, 0, 1) },
			})
		},
		"background": func(v *yaml.Node, kp string) {
			b := &d.Background
			p.fields(v, kp, map[string]func(*yaml.Node, string){
				"desaturations_per_h": func(v *yaml.Node, kp string) { b.DesaturationsPerH = p.num(v, kp, 0, 60) },
				"sensor_off_per_h":    func(v *yaml.Node, kp string) { b.SensorOffPerH = p.num(v, kp, 0, 60) },
				"motion_per_h":        func(v *yaml.Node, kp string) { b.MotionPerH = p.num(v, kp, 0, 60) },
			})
		},
	}
	if withID {
		h["id"] = func(v *yaml.Node, kp string) {
			d.ID = p.str(v, kp, 64)
			if p.err == nil && !idRE.MatchString(d.ID) {
				p.failf(v, kp, "%q, want 1..64 characters of [A-Za-z0-9._-]", d.ID)
			}
		}
	}
	return p.fields(n, path, h)
}

// DefaultDevice is what a device is before the file's defaults and its own
// keys apply.
func DefaultDevice() Device {
	return Device{
		Patient: Patient{SpO2Pct: 97, PulseBPM: 72, PIPct: 2, RespRateBPM: 14},
		Battery: Battery{StartPct: 100, DrainPctPerH: 2},
	}
}

func (p *parser) scenario(n *yaml.Node) *Scenario {
	sc := &Scenario{}
	var defaultsNode, devicesNode, eventsNode *yaml.Node
	var defaultsPath string
	seen := p.fields(n, "", map[string]func(*yaml.Node, string){
		"name": func(v *yaml.Node, kp string) {
			sc.Name = p.str(v, kp, 64)
			if p.err == nil && !idRE.MatchString(sc.Name) {
				p.failf(v, kp, "%q, want 1..64 characters of [A-Za-z0-9._-]", sc.Name)
			}
		},
		"description": func(v *yaml.Node, kp string) { sc.Description = p.str(v, kp, 4000) },
		"duration":    func(v *yaml.Node, kp string) { sc.Duration = p.dur(v, kp, time.Second, MaxDuration) },
		"speed":       func(v *yaml.Node, kp string) { sc.Speed = p.num(v, kp, 0.01, 100000) },
		"mode":        func(v *yaml.Node, kp string) { sc.Mode = p.mode(v, kp) },
		"rate_hz":     func(v *yaml.Node, kp string) { sc.RateHz = p.num(v, kp, 25, 1000) },
		"defaults":    func(v *yaml.Node, kp string) { defaultsNode, defaultsPath = v, kp },
		"devices":     func(v *yaml.Node, kp string) { devicesNode = v },
		"events":      func(v *yaml.Node, kp string) { eventsNode = v },
	})
	if p.err != nil {
		return nil
	}
	for _, k := range []string{"name", "devices"} {
		if !seen[k] {
			p.failf(n, k, "required key missing")
			return nil
		}
	}
	base := DefaultDevice()
	if defaultsNode != nil {
		p.device(defaultsNode, defaultsPath, &base, false)
	}
	if devicesNode.Kind != yaml.SequenceNode || len(devicesNode.Content) == 0 {
		p.failf(devicesNode, "devices", "want a list of at least one device")
		return nil
	}
	if len(devicesNode.Content) > MaxDevices {
		p.failf(devicesNode, "devices", "%d devices, want at most %d", len(devicesNode.Content), MaxDevices)
		return nil
	}
	index := map[string]int{}
	for i, dn := range devicesNode.Content {
		path := fmt.Sprintf("devices[%d]", i)
		d := base
		d.Labels = base.Labels
		got := p.device(dn, path, &d, true)
		if p.err != nil {
			return nil
		}
		if !got["id"] {
			p.failf(dn, yamlwalk.Join(path, "id"), "required key missing")
			return nil
		}
		if j, dup := index[d.ID]; dup {
			p.failf(dn, yamlwalk.Join(path, "id"), "%q already used by devices[%d]", d.ID, j)
			return nil
		}
		index[d.ID] = i
		sc.Devices = append(sc.Devices, d)
	}
	if eventsNode != nil {
		p.events(eventsNode, sc, index)
	}
	if p.err != nil {
		return nil
	}
	for i := range sc.Devices {
		ev := sc.Devices[i].Events
		slices.SortStableFunc(ev, func(a, b Event) int { return cmp.Compare(a.At, b.At) })
	}
	return sc
}

func (p *parser) events(n *yaml.Node, sc *Scenario, index map[string]int) {
	if n.Kind != yaml.SequenceNode {
		p.failf(n, "events", "want a list of events")
		return
	}
	if len(n.Content) > MaxEvents {
		p.failf(n, "events", "%d events, want at most %d", len(n.Content), MaxEvents)
		return
	}
	for i, en := range n.Content {
		path := fmt.Sprintf("events[%d]", i)
		ev, targets := p.event(en, path, sc)
		if p.err != nil {
			return
		}
		for _, id := range targets {
			j, ok := index[id]
			if !ok {
				p.failf(en, yamlwalk.Join(path, "device"), "%q is not a device of this scenario", id)
				return
			}
			sc.Devices[j].Events = append(sc.Devices[j].Events, ev)
		}
	}
}

// event parses the entry en of events (at path): when it happens, the
// devices it targets, and the one thing it does.
func (p *parser) event(en *yaml.Node, path string, sc *Scenario) (ev Event, targets []string) {
	seen := p.fields(en, path, map[string]func(*yaml.Node, string){
		"at":     func(v *yaml.Node, kp string) { ev.At = p.dur(v, kp, 0, MaxDuration) },
		"device": func(v *yaml.Node, kp string) { targets = append(targets, p.str(v, kp, 64)) },
		"devices": func(v *yaml.Node, kp string) {
			if v.Kind != yaml.SequenceNode {
				p.failf(v, kp, "want a list of device ids")
				return
			}
			for j, x := range v.Content {
				targets = append(targets, p.str(x, fmt.Sprintf("%s[%d]", kp, j), 64))
			}
		},
		"desaturate": p.ramp(&ev, Desaturate, 50, 100),
		"pulse":      p.ramp(&ev, Pulse, 20, 250),
		"perfusion":  p.ramp(&ev, Perfusion, 0.02, 20),
		"sensor_off": p.spell(&ev, SensorOff),
		"motion":     p.spell(&ev, Motion),
		"offline":    p.spell(&ev, Offline),
		"charge":     p.spell(&ev, Charge),
	})
	if p.err != nil {
		return ev, targets
	}
	switch {
	case !seen["at"]:
		p.failf(en, yamlwalk.Join(path, "at"), "required key missing")
	case len(targets) == 0:
		p.failf(en, yamlwalk.Join(path, "device"), "required key missing (device or devices)")
	case ev.Kind == 0:
		p.failf(en, path, "no event kind (want one of charge, desaturate, motion, offline, perfusion, pulse, sensor_off)")
	case sc.Duration > 0 && ev.At > sc.Duration:
		p.failf(en, yamlwalk.Join(path, "at"), "%v is after the scenario's duration %v", ev.At, sc.Duration)
	}
	return ev, targets
}

// ramp parses an event that moves a vital sign of kind k to a target in
// [lo, hi] over a time, holds it, and recovers; it fills ev.
func (p *parser) ramp(ev *Event, k Kind, lo, hi float64) func(*yaml.Node, string) {
	return func(v *yaml.Node, kp string) {
		if ev.Kind != 0 {
			p.failf(v, kp, "an event does one thing; this one already has %s", ev.Kind)
			return
		}
		ev.Kind = k
		ev.Over, ev.Hold = 30*time.Second, 60*time.Second
		got := p.fields(v, kp, map[string]func(*yaml.Node, string){
			"to":      func(v *yaml.Node, kp string) { ev.To = p.num(v, kp, lo, hi) },
			"over":    func(v *yaml.Node, kp string) { ev.Over = p.dur(v, kp, 0, time.Hour) },
			"hold":    func(v *yaml.Node, kp string) { ev.Hold = p.dur(v, kp, 0, 24*time.Hour) },
			"recover": func(v *yaml.Node, kp string) { ev.Recover = p.dur(v, kp, 0, time.Hour) },
		})
		if p.err == nil && !got["to"] {
			p.failf(v, yamlwalk.Join(kp, "to"), "required key missing")
		}
	}
}

// spell parses an event of kind k that lasts a while (for:), with an
// intensity for motion; it fills ev.
func (p *parser) spell(ev *Event, k Kind) func(*yaml.Node, string) {
	return func(v *yaml.Node, kp string) {
		if ev.Kind != 0 {
			p.failf(v, kp, "an event does one thing; this one already has %s", ev.Kind)
			return
		}
		ev.Kind = k
		h := map[string]func(*yaml.Node, string){
			"for": func(v *yaml.Node, kp string) { ev.Hold = p.dur(v, kp, time.Second, MaxDuration) },
		}
		if k == Motion {
			ev.Intensity = 0.6
			h["intensity"] = func(v *yaml.Node, kp string) { ev.Intensity = p.num(v, kp, 0.01, 1) }
		}
		got := p.fields(v, kp, h)
		if p.err == nil && !got["for"] {
			p.failf(v, yamlwalk.Join(kp, "for"), "required key missing")
		}
	}
}
