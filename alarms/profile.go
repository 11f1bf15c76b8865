package alarms

import (
	"errors"
	"fmt"
	"math"
	"os"
	"strconv"
	"strings"
	"time"

	"go.yaml.in/yaml/v3"

	"github.com/pulsefleet/pulsefleet/internal/yamlwalk"
)

// DefaultPauseMax is the longest alarm pause when a profile sets none
// (team choice).
const DefaultPauseMax = 2 * time.Minute

// DefaultBaseline is the desaturation baseline window when a condition sets
// none (team choice; a 2-minute look-back is common practice in oximetry
// scoring software).
const DefaultBaseline = 120 * time.Second

// DefaultClockFault is the device_clock_fault condition an Engine adds when
// its profile has none: an alarm system must not be silently disabled (IEC
// 60601-1-8), and a device whose data the gateway refuses for its clock is
// not monitored. Delay 10 s (team choice: shorter than the 15 s spo2_low
// delay of adult-ward-pilot, so a refused clock is announced no later than
// the low SpO2 it may hide would have been), priority medium (team choice;
// IEC 60601-1-8 medium = prompt response, as signal_lost after escalation).
var DefaultClockFault = Condition{Kind: DeviceClockFault, Delay: 10 * time.Second, Priority: PriorityMedium}

// Profile is a set of alarm conditions for a stream.
//
// File format (YAML; the CONTRACT keys are name and conditions[].kind, limit,
// hysteresis, delay, priority, escalate.{below,after,priority}):
//
//	name: adult-ward-pilot      # [a-z0-9._-], 1..64 chars
//	description: free text      # optional
//	pause_max: 2m               # optional, longest alarm pause, (0, 1h]; default 2m
//	conditions:
//	  - kind: spo2_low          # see Kind
//	    name: spo2_low          # optional, unique; default the kind ([a-z0-9_-])
//	    limit: 90               # alarm limit, unit of the kind
//	    hysteresis: 2           # clears only at limit+hysteresis (low) / limit-hysteresis (high)
//	    delay: 15s              # alarm condition delay, [0, 10m]
//	    priority: medium        # low | medium | high
//	    escalate: {below: 85, after: 60s, priority: high}   # above: for *_high kinds
//	    latching: false         # signal continues after the end until acknowledged
//	    baseline: 120s          # desaturation only: running-baseline window, [10s, 10m]
type Profile struct {
	Name        string
	Description string
	// PauseMax is the longest pause Engine.Pause accepts; zero means DefaultPauseMax.
	PauseMax   time.Duration
	Conditions []Condition
}

// Condition is one alarm condition of a profile. Units of Limit and
// Hysteresis follow the kind: SpO2 in %, pulse in /min, PI in %, SQI 0..1;
// for Desaturation Limit is the drop in SpO2 points below the baseline (3 or
// 4 in sleep-medicine scoring). SignalLost, DeviceOffline and
// DeviceClockFault use neither.
type Condition struct {
	Name       string        // unique in the profile; "" means Kind.String()
	Kind       Kind          //
	Limit      float64       // alarm limit (see above)
	Hysteresis float64       // >= 0; zero means the condition clears as soon as it is no longer present
	Delay      time.Duration // alarm condition delay; zero announces at onset
	Priority   Priority      // Low, Medium or High
	Escalate   *Escalation   // nil: never escalates
	Latching   bool          // latching alarm signal
	// Baseline is the window of the desaturation running baseline (the highest
	// valid SpO2 within it); zero means DefaultBaseline. Desaturation only.
	Baseline time.Duration
}

// Escalation raises an announced episode's priority at the first sample
// where the value is beyond a depth limit or the condition has been present
// for After.
type Escalation struct {
	Below    float64       // low kinds and desaturation (SpO2 %): escalate when value < Below; 0 = no depth rule
	Above    float64       // high kinds: escalate when value > Above; 0 = no depth rule
	After    time.Duration // escalate when present time >= After; 0 = no duration rule
	Priority Priority      // priority after escalation, above the condition's
}

// ConditionName returns the name of c (its kind's name when unnamed).
func (c *Condition) ConditionName() string {
	if c.Name != "" {
		return c.Name
	}
	return c.Kind.String()
}

// FieldError is a profile value out of bounds or an unknown key. Path names
// the key like conditions[0].delay.
type FieldError = yamlwalk.Error

func fieldErr(path, format string, args ...any) *FieldError {
	return yamlwalk.Errorf(path, format, args...)
}

// LoadProfile reads and validates a profile file.
func LoadProfile(path string) (*Profile, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("load profile: %w", err)
	}
	p, err := ParseProfile(b)
	if err != nil {
		return nil, fmt.Errorf("profile %s: %w", path, err)
	}
	return p, nil
}

// ParseProfile decodes and validates a profile. Unknown keys and bad values
// give a *FieldError naming the key path and the bound.
func ParseProfile(data []byte) (*Profile, error) {
	var root yaml.Node
	if err := yaml.Unmarshal(data, &root); err != nil {
		return nil, fmt.Errorf("parse profile: %w", err)
	}
	if root.Kind != yaml.DocumentNode || len(root.Content) == 0 {
		return nil, errors.New("parse profile: empty document")
	}
	p := &Profile{}
	if err := decodeProfile(root.Content[0], p); err != nil {
		return nil, err
	}
	if err := p.Validate(); err != nil {
		return nil, err
	}
	return p, nil
}

func unknownKey(path string) error { return fieldErr(path, "unknown key") }

func decodeProfile(n *yaml.Node, p *Profile) error {
	return yamlwalk.Mapping(n, "", func(key string, v *yaml.Node, path string) error {
		switch key {
		case "name":
			return scalarString(v, path, &p.Name)
		case "description":
			return scalarString(v, path, &p.Description)
		case "pause_max":
			return scalarDuration(v, path, &p.PauseMax)
		case "conditions":
			if v.Kind != yaml.SequenceNode {
				return fieldErr(path, "want a list")
			}
			p.Conditions = make([]Condition, len(v.Content))
			for i, cn := range v.Content {
				if err := decodeCondition(cn, fmt.Sprintf("conditions[%d]", i), &p.Conditions[i]); err != nil {
					return err
				}
			}
			return nil
		}
		return unknownKey(path)
	})
}

func decodeCondition(n *yaml.Node, path string, c *Condition) error {
	return yamlwalk.Mapping(n, path, func(key string, v *yaml.Node, path string) error {
		if key == "escalate" {
			c.Escalate = &Escalation{}
			return yamlwalk.Mapping(v, path, func(key string, v *yaml.Node, path string) error {
				return setEscalationField(c.Escalate, key, v, path)
			})
		}
		return setConditionField(c, key, v, path)
	})
}

func setConditionField(c *Condition, key string, v *yaml.Node, path string) error {
	switch key {
	case "kind":
		var s string
		if err := scalarString(v, path, &s); err != nil {
			return err
		}
		k, err := ParseKind(s)
		if err != nil {
			return fieldErr(path, "%v", err)
		}
		c.Kind = k
		return nil
	case "name":
		return scalarString(v, path, &c.Name)
	case "limit":
		return scalarFloat(v, path, &c.Limit)
	case "hysteresis":
		return scalarFloat(v, path, &c.Hysteresis)
	case "delay":
		return scalarDuration(v, path, &c.Delay)
	case "priority":
		return scalarPriority(v, path, &c.Priority)
	case "latching":
		return scalarBool(v, path, &c.Latching)
	case "baseline":
		return scalarDuration(v, path, &c.Baseline)
	}
	return unknownKey(path)
}

func setEscalationField(e *Escalation, key string, v *yaml.Node, path string) error {
	switch key {
	case "below":
		return scalarFloat(v, path, &e.Below)
	case "above":
		return scalarFloat(v, path, &e.Above)
	case "after":
		return scalarDuration(v, path, &e.After)
	case "priority":
		return scalarPriority(v, path, &e.Priority)
	}
	return unknownKey(path)
}

func scalar(v *yaml.Node, path string) (string, error) {
	if v.Kind != yaml.ScalarNode {
		return "", fieldErr(path, "want a single value")
	}
	return v.Value, nil
}

func scalarString(v *yaml.Node, path string, dst *string) error {
	s, err := scalar(v, path)
	*dst = s
	return err
}

// scalarAs decodes a scalar with parse; want says what a good value looks like.
func scalarAs[T any](v *yaml.Node, path string, dst *T, want string, parse func(string) (T, bool)) error {
	s, err := scalar(v, path)
	if err != nil {
		return err
	}
	x, ok := parse(strings.TrimSpace(s))
	if !ok {
		return fieldErr(path, "%q, want %s", s, want)
	}
	*dst = x
	return nil
}

func scalarFloat(v *yaml.Node, path string, dst *float64) error {
	return scalarAs(v, path, dst, "a finite number", func(s string) (float64, bool) {
		f, err := strconv.ParseFloat(s, 64)
		return f, err == nil && !math.IsNaN(f) && !math.IsInf(f, 0)
	})
}

func scalarDuration(v *yaml.Node, path string, dst *time.Duration) error {
	return scalarAs(v, path, dst, "a duration like 15s or 2m", func(s string) (time.Duration, bool) {
		d, err := time.ParseDuration(s)
		return d, err == nil
	})
}

func scalarPriority(v *yaml.Node, path string, dst *Priority) error {
	return scalarAs(v, path, dst, "low, medium or high", func(s string) (Priority, bool) {
		p, err := ParsePriority(s)
		return p, err == nil && p != PriorityNone
	})
}

func scalarBool(v *yaml.Node, path string, dst *bool) error {
	return scalarAs(v, path, dst, "true or false", func(s string) (bool, bool) {
		return s == "true", s == "true" || s == "false"
	})
}

// kindInfo describes how a kind is evaluated and bounded.
type kindInfo struct {
	field            uint8 // which Sample field
	high             bool  // present when value > limit
	hasLimit         bool
	limitLo, limitHi float64 // limit must be in [limitLo, limitHi]
	hystHi           float64 // hysteresis in [0, hystHi]
	unit             string
}

const (
	fieldSpO2 uint8 = iota
	fieldPulse
	fieldPI
	fieldSQI
	fieldNone
)

var kinds = [numKinds]kindInfo{
	SpO2Low:          {field: fieldSpO2, hasLimit: true, limitLo: 50, limitHi: 100, hystHi: 10, unit: "%"},
	SpO2High:         {field: fieldSpO2, high: true, hasLimit: true, limitLo: 50, limitHi: 100, hystHi: 10, unit: "%"},
	PulseLow:         {field: fieldPulse, hasLimit: true, limitLo: 20, limitHi: 300, hystHi: 50, unit: "/min"},
	PulseHigh:        {field: fieldPulse, high: true, hasLimit: true, limitLo: 20, limitHi: 300, hystHi: 50, unit: "/min"},
	Desaturation:     {field: fieldSpO2, hasLimit: true, limitLo: 1, limitHi: 20, hystHi: 20, unit: "points"},
	SignalLost:       {field: fieldNone},
	SignalPoor:       {field: fieldSQI, hasLimit: true, limitLo: 0.01, limitHi: 1, hystHi: 1},
	PerfusionLow:     {field: fieldPI, hasLimit: true, limitLo: 0.01, limitHi: 20, hystHi: 20, unit: "%"},
	DeviceOffline:    {field: fieldNone},
	DeviceClockFault: {field: fieldNone},
}

const maxDelay = 10 * time.Minute

// Validate checks every field and returns a *FieldError naming the first one
// out of bounds.
func (p *Profile) Validate() error {
	if n := len(p.Name); n < 1 || n > 64 {
		return fieldErr("name", "length %d, want 1..64", n)
	}
	if err := checkName("name", p.Name, true); err != nil {
		return err
	}
	if p.PauseMax < 0 || p.PauseMax > time.Hour {
		return fieldErr("pause_max", "%v, want in (0, 1h]", p.PauseMax)
	}
	if len(p.Conditions) == 0 {
		return fieldErr("conditions", "empty, want at least one condition")
	}
	names := map[string]int{}
	for i := range p.Conditions {
		c := &p.Conditions[i]
		path := fmt.Sprintf("conditions[%d]", i)
		if err := c.validate(path); err != nil {
			return err
		}
		n := c.ConditionName()
		if j, dup := names[n]; dup {
			return fieldErr(path+".name", "%q already used by conditions[%d], want unique names (set name: to tell two conditions of one kind apart)", n, j)
		}
		names[n] = i
	}
	return nil
}

func checkName(path, s string, dots bool) error {
	for _, r := range s {
		if !(r >= 'a' && r <= 'z' || r >= '0' && r <= '9' || r == '_' || r == '-' || dots && r == '.') {
			if dots {
				return fieldErr(path, "%q has %q, want only a-z 0-9 . _ -", s, r)
			}
			return fieldErr(path, "%q has %q, want only a-z 0-9 _ -", s, r)
		}
	}
	return nil
}

func fmtF(f float64) string { return strconv.FormatFloat(f, 'g', -1, 64) }

func (c *Condition) validate(path string) error {
	if c.Kind == KindInvalid || c.Kind >= numKinds {
		return fieldErr(path+".kind", "missing, want one of spo2_low, spo2_high, pulse_low, pulse_high, desaturation, signal_lost, signal_poor, perfusion_low, device_offline, device_clock_fault")
	}
	if len(c.Name) > 64 {
		return fieldErr(path+".name", "length %d, want <= 64", len(c.Name))
	}
	if err := checkName(path+".name", c.Name, false); err != nil {
		return err
	}
	ki := kinds[c.Kind]
	if ki.hasLimit {
		if !(c.Limit >= ki.limitLo && c.Limit <= ki.limitHi) {
			return fieldErr(path+".limit", "%s, want in [%s, %s] for %s", fmtF(c.Limit), fmtF(ki.limitLo), fmtF(ki.limitHi), c.Kind)
		}
		hi := ki.hystHi
		if c.Kind == Desaturation {
			hi = c.Limit // the event must be able to clear above baseline-drop
		}
		if !(c.Hysteresis >= 0 && c.Hysteresis <= hi) {
			return fieldErr(path+".hysteresis", "%s, want in [0, %s]", fmtF(c.Hysteresis), fmtF(hi))
		}
	} else {
		if c.Limit != 0 {
			return fieldErr(path+".limit", "%s, not used by %s (want it absent)", fmtF(c.Limit), c.Kind)
		}
		if c.Hysteresis != 0 {
			return fieldErr(path+".hysteresis", "%s, not used by %s (want it absent)", fmtF(c.Hysteresis), c.Kind)
		}
	}
	if c.Delay < 0 {
		return fieldErr(path+".delay", "%v, want >= 0", c.Delay)
	}
	if c.Delay > maxDelay {
		return fieldErr(path+".delay", "%v, want <= %v", c.Delay, maxDelay)
	}
	if c.Priority < PriorityLow || c.Priority > PriorityHigh {
		return fieldErr(path+".priority", "missing, want low, medium or high")
	}
	if c.Kind == Desaturation {
		if c.Baseline != 0 && (c.Baseline < 10*time.Second || c.Baseline > 10*time.Minute) {
			return fieldErr(path+".baseline", "%v, want in [10s, 10m]", c.Baseline)
		}
	} else if c.Baseline != 0 {
		return fieldErr(path+".baseline", "%v, used only by desaturation (want it absent)", c.Baseline)
	}
	if c.Escalate != nil {
		return c.validateEscalate(path+".escalate", ki)
	}
	return nil
}

// validateEscalate checks the condition's escalate rule (at path ep) against
// the condition's kind ki and priority.
func (c *Condition) validateEscalate(ep string, ki kindInfo) error {
	e := c.Escalate
	if e.Priority <= c.Priority || e.Priority > PriorityHigh {
		return fieldErr(ep+".priority", "%s, want above the condition's priority %s", e.Priority, c.Priority)
	}
	if e.After < 0 || e.After > 24*time.Hour {
		return fieldErr(ep+".after", "%v, want in (0, 24h] (or absent)", e.After)
	}
	switch {
	case ki.field == fieldNone || c.Kind == SignalPoor || c.Kind == PerfusionLow:
		if e.Below != 0 {
			return fieldErr(ep+".below", "%s, %s escalates only by duration (want it absent)", fmtF(e.Below), c.Kind)
		}
		if e.Above != 0 {
			return fieldErr(ep+".above", "%s, %s escalates only by duration (want it absent)", fmtF(e.Above), c.Kind)
		}
	case ki.high:
		if e.Below != 0 {
			return fieldErr(ep+".below", "%s, %s escalates above a value (use above:)", fmtF(e.Below), c.Kind)
		}
		if e.Above != 0 && !(e.Above > c.Limit && e.Above <= ki.limitHi) {
			return fieldErr(ep+".above", "%s, want in (%s, %s]", fmtF(e.Above), fmtF(c.Limit), fmtF(ki.limitHi))
		}
	default:
		if e.Above != 0 {
			return fieldErr(ep+".above", "%s, %s escalates below a value (use below:)", fmtF(e.Above), c.Kind)
		}
		lim := c.Limit
		if c.Kind == Desaturation {
			lim = 100 // below is absolute SpO2 (%)
		}
		if e.Below != 0 && !(e.Below > 0 && e.Below < lim) {
			return fieldErr(ep+".below", "%s, want in (0, %s)", fmtF(e.Below), fmtF(lim))
		}
	}
	if e.Below == 0 && e.Above == 0 && e.After == 0 {
		return fieldErr(ep, "no rule, want below/above or after")
	}
	return nil
}

// Clone returns a deep copy of p.
func (p *Profile) Clone() *Profile {
	q := *p
	q.Conditions = append([]Condition(nil), p.Conditions...)
	for i := range q.Conditions {
		if e := q.Conditions[i].Escalate; e != nil {
			ec := *e
			q.Conditions[i].Escalate = &ec
		}
	}
	return &q
}

// Condition returns the condition named name (or nil).
func (p *Profile) Condition(name string) *Condition {
	for i := range p.Conditions {
		if p.Conditions[i].ConditionName() == name {
			return &p.Conditions[i]
		}
	}
	return nil
}

// Set changes one value, addressed the way a tuning grid sweeps it:
// "CONDITION.KEY" or "CONDITION.escalate.KEY" (CONDITION is the condition's
// name, by default its kind), or a top-level key (name, pause_max). value is
// written as in the profile file ("88", "15s", "high"). The profile is
// validated afterwards; on error it may be left changed, so Set a Clone.
func (p *Profile) Set(key, value string) error {
	v := &yaml.Node{Kind: yaml.ScalarNode, Value: value}
	parts := strings.Split(key, ".")
	var err error
	switch {
	case len(parts) == 1:
		switch key {
		case "name":
			p.Name = value
		case "pause_max":
			err = scalarDuration(v, key, &p.PauseMax)
		default:
			err = unknownKey(key)
		}
	case len(parts) == 2 || len(parts) == 3 && parts[1] == "escalate":
		c := p.Condition(parts[0])
		if c == nil {
			return fieldErr(key, "no condition named %q in profile %s", parts[0], p.Name)
		}
		if len(parts) == 3 {
			if c.Escalate == nil {
				c.Escalate = &Escalation{}
			}
			err = setEscalationField(c.Escalate, parts[2], v, key)
		} else if parts[1] == "kind" || parts[1] == "name" || parts[1] == "escalate" {
			err = fieldErr(key, "cannot be swept")
		} else {
			err = setConditionField(c, parts[1], v, key)
		}
	default:
		err = unknownKey(key)
	}
	if err != nil {
		return err
	}
	err = p.Validate()
	var fe *FieldError
	if errors.As(err, &fe) {
		// Name the condition the way the caller did: spo2_low.delay, not conditions[0].delay.
		for i := range p.Conditions {
			prefix := fmt.Sprintf("conditions[%d]", i)
			if strings.HasPrefix(fe.Path, prefix+".") {
				fe.Path = p.Conditions[i].ConditionName() + strings.TrimPrefix(fe.Path, prefix)
			}
		}
	}
	return err
}

// yamlProfile and friends fix the key order of Marshal.
type yamlProfile struct {
	Name        string          `yaml:"name"`
	Description string          `yaml:"description,omitempty"`
	PauseMax    string          `yaml:"pause_max,omitempty"`
	Conditions  []yamlCondition `yaml:"conditions"`
}

type yamlCondition struct {
	Kind       string          `yaml:"kind"`
	Name       string          `yaml:"name,omitempty"`
	Limit      *float64        `yaml:"limit,omitempty"`
	Hysteresis *float64        `yaml:"hysteresis,omitempty"`
	Delay      string          `yaml:"delay"`
	Priority   string          `yaml:"priority"`
	Escalate   *yamlEscalation `yaml:"escalate,omitempty"`
	Latching   bool            `yaml:"latching,omitempty"`
	Baseline   string          `yaml:"baseline,omitempty"`
}

type yamlEscalation struct {
	Below    float64 `yaml:"below,omitempty"`
	Above    float64 `yaml:"above,omitempty"`
	After    string  `yaml:"after,omitempty"`
	Priority string  `yaml:"priority"`
}

func durStr(d time.Duration) string {
	if d == 0 {
		return ""
	}
	return fmtDur(d)
}

// fmtDur writes whole seconds as "90s" (not "1m30s"), other durations as Go does.
func fmtDur(d time.Duration) string {
	if d%time.Second == 0 {
		return strconv.FormatInt(int64(d/time.Second), 10) + "s"
	}
	return d.String()
}

// Marshal encodes p in the profile file format; ParseProfile(Marshal(p))
// equals p.
func (p *Profile) Marshal() ([]byte, error) {
	y := yamlProfile{Name: p.Name, Description: p.Description, PauseMax: durStr(p.PauseMax)}
	for _, c := range p.Conditions {
		yc := yamlCondition{Kind: c.Kind.String(), Name: c.Name, Delay: fmtDur(c.Delay),
			Priority: c.Priority.String(), Latching: c.Latching, Baseline: durStr(c.Baseline)}
		if kinds[c.Kind].hasLimit {
			l, h := c.Limit, c.Hysteresis
			yc.Limit, yc.Hysteresis = &l, &h
		}
		if e := c.Escalate; e != nil {
			yc.Escalate = &yamlEscalation{Below: e.Below, Above: e.Above, After: durStr(e.After), Priority: e.Priority.String()}
		}
		y.Conditions = append(y.Conditions, yc)
	}
	b, err := yaml.Marshal(&y)
	if err != nil {
		return nil, fmt.Errorf("marshal profile %s: %w", p.Name, err)
	}
	return b, nil
}
