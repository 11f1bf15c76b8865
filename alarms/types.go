package alarms

import (
	"fmt"
	"math"
)

// Priority is the urgency of an alarm condition in IEC 60601-1-8 terms:
// high = immediate response required, medium = prompt response required,
// low = awareness required. The order is None < Low < Medium < High.
type Priority uint8

// Priorities, in increasing order.
const (
	PriorityNone Priority = iota
	PriorityLow
	PriorityMedium
	PriorityHigh
)

var priorityNames = [...]string{"none", "low", "medium", "high"}

// String returns none, low, medium or high.
func (p Priority) String() string {
	if int(p) < len(priorityNames) {
		return priorityNames[p]
	}
	return fmt.Sprintf("priority(%d)", p)
}

// ParsePriority parses low, medium or high (and none).
func ParsePriority(s string) (Priority, error) {
	for i, n := range priorityNames {
		if s == n {
			return Priority(i), nil
		}
	}
	return PriorityNone, fmt.Errorf("priority %q, want low, medium or high", s)
}

// MarshalText encodes the priority by name (JSON and YAML use it).
func (p Priority) MarshalText() ([]byte, error) { return []byte(p.String()), nil }

// UnmarshalText decodes a priority name.
func (p *Priority) UnmarshalText(b []byte) error {
	v, err := ParsePriority(string(b))
	if err != nil {
		return err
	}
	*p = v
	return nil
}

// Kind is what an alarm condition watches. Physiological kinds compare a
// measured value with a limit; technical kinds (SignalLost, SignalPoor,
// PerfusionLow, DeviceOffline, DeviceClockFault) describe the measurement
// itself or the equipment.
type Kind uint8

// Kinds of alarm condition. The zero Kind is invalid.
const (
	KindInvalid      Kind = iota
	SpO2Low               // SpO2 < limit (%)
	SpO2High              // SpO2 > limit (%)
	PulseLow              // pulse rate < limit (/min)
	PulseHigh             // pulse rate > limit (/min)
	Desaturation          // SpO2 at least limit points below a running baseline
	SignalLost            // no valid SpO2
	SignalPoor            // signal quality index < limit (0..1)
	PerfusionLow          // perfusion index < limit (%)
	DeviceOffline         // the gateway reports the device offline (SetOffline)
	DeviceClockFault      // the gateway refuses or distrusts the device's clock (SetClockFault)
	numKinds
)

var kindNames = [...]string{"invalid", "spo2_low", "spo2_high", "pulse_low", "pulse_high",
	"desaturation", "signal_lost", "signal_poor", "perfusion_low", "device_offline", "device_clock_fault"}

var kindLabels = [...]string{"invalid", "SpO2 low", "SpO2 high", "pulse rate low", "pulse rate high",
	"desaturation", "SpO2 signal lost", "poor signal", "low perfusion", "device offline", "device clock fault"}

// String returns the profile-file name of the kind, e.g. spo2_low.
func (k Kind) String() string {
	if int(k) < len(kindNames) {
		return kindNames[k]
	}
	return fmt.Sprintf("kind(%d)", k)
}

// Label returns a readable label of the kind, e.g. "device clock fault".
func (k Kind) Label() string {
	if int(k) < len(kindLabels) {
		return kindLabels[k]
	}
	return k.String()
}

// Technical reports whether k is a technical alarm condition (about the
// equipment or the signal rather than the patient).
func (k Kind) Technical() bool { return k >= SignalLost && k < numKinds }

// ParseKind parses a kind name as used in profile files.
func ParseKind(s string) (Kind, error) {
	for i := 1; i < len(kindNames); i++ {
		if s == kindNames[i] {
			return Kind(i), nil
		}
	}
	return KindInvalid, fmt.Errorf("kind %q, want one of spo2_low, spo2_high, pulse_low, pulse_high, desaturation, signal_lost, signal_poor, perfusion_low, device_offline, device_clock_fault", s)
}

// MarshalText encodes the kind by name.
func (k Kind) MarshalText() ([]byte, error) { return []byte(k.String()), nil }

// UnmarshalText decodes a kind name.
func (k *Kind) UnmarshalText(b []byte) error {
	v, err := ParseKind(string(b))
	if err != nil {
		return err
	}
	*k = v
	return nil
}

// Phase is the state of one alarm condition of one stream, named like the
// states of a Prometheus alerting rule.
type Phase uint8

// Phases. Inactive also marks a finished episode.
const (
	Inactive Phase = iota // condition absent (or, for an Episode, finished)
	Pending               // condition present, alarm condition delay running
	Active                // announced: the alarm condition exists
	Latched               // latching condition cleared, signal waits for acknowledgement
)

var phaseNames = [...]string{"inactive", "pending", "active", "latched"}

// String returns inactive, pending, active or latched.
func (p Phase) String() string {
	if int(p) < len(phaseNames) {
		return phaseNames[p]
	}
	return fmt.Sprintf("phase(%d)", p)
}

// MarshalText encodes the phase by name.
func (p Phase) MarshalText() ([]byte, error) { return []byte(p.String()), nil }

// UnmarshalText decodes a phase name.
func (p *Phase) UnmarshalText(b []byte) error {
	for i, n := range phaseNames {
		if string(b) == n {
			*p = Phase(i)
			return nil
		}
	}
	return fmt.Errorf("phase %q, want inactive, pending, active or latched", b)
}

// EventType is what happened in an Event.
type EventType uint8

// Event types. Every one goes to the episode/audit log.
const (
	EventOnset        EventType = iota + 1 // condition became present; delay starts
	EventAnnounced                         // present for at least the delay: alarm condition exists
	EventEscalated                         // priority raised by depth or duration
	EventEnded                             // an announced condition cleared
	EventWithdrawn                         // condition cleared before its delay: no alarm
	EventAcknowledged                      // an operator acknowledged the episode (latched ones stop)
	EventPaused                            // alarm signals paused for the stream until Event.Until
	EventResumed                           // the pause ended (expired or ended by Who)
	EventReleased                          // a latched signal stopped because SetProfile removed its condition
)

var eventNames = [...]string{"", "onset", "announced", "escalated", "ended", "withdrawn",
	"acknowledged", "paused", "resumed", "released"}

// String returns the lower-case name of the event type.
func (t EventType) String() string {
	if t > 0 && int(t) < len(eventNames) {
		return eventNames[t]
	}
	return fmt.Sprintf("event(%d)", t)
}

// MarshalText encodes the event type by name.
func (t EventType) MarshalText() ([]byte, error) { return []byte(t.String()), nil }

// UnmarshalText decodes an event type name.
func (t *EventType) UnmarshalText(b []byte) error {
	for i := 1; i < len(eventNames); i++ {
		if string(b) == eventNames[i] {
			*t = EventType(i)
			return nil
		}
	}
	return fmt.Errorf("event type %q unknown", b)
}

// Sample is one trend point of one stream. T is in seconds on any fixed
// epoch (Unix seconds in the gateway, file seconds in replay). A missing
// value is NaN; values outside the plausible range (SpO2 outside (0, 100],
// pulse outside (0, 350] /min, PI outside [0, 100] %, SQI outside [0, 1])
// count as missing.
type Sample struct {
	T     float64 // seconds
	SpO2  float64 // %
	Pulse float64 // /min
	PI    float64 // perfusion index, %
	SQI   float64 // signal quality index, 0..1
}

// Missing is the value of a missing Sample field (NaN).
var Missing = math.NaN()

// Episode is one alarm condition of one stream from onset to end. Times are
// seconds on the samples' clock; NaN means "not (yet) happened". An episode
// that was never announced is withdrawn and appears only in Withdrawn events.
type Episode struct {
	ID         uint64   // per engine, increasing from 1; survives Snapshot/Restore
	Device     string   // as given to NewEngine
	Condition  string   // the condition's name in the profile (defaults to its kind)
	Kind       Kind     //
	Priority   Priority // current priority: the highest reached
	Phase      Phase    // pending, active, latched, or inactive once finished
	OnsetS     float64  // first sample at which the condition was present
	AnnouncedS float64  // first sample at which it had been present for at least the delay
	EscalatedS float64  // escalation by depth or duration
	EndedS     float64  // the sample that cleared the condition
	// MinSpO2 is the lowest valid SpO2 (%) from onset up to the end (NaN if none).
	MinSpO2 float64
	// DeficitPctS is the oxygen deficit in %·s: the integral of SpO2 below the
	// reference (the limit for spo2_low, the frozen baseline for desaturation;
	// zero for other kinds), holding each valid sample until the next sample.
	DeficitPctS float64
	// Limit is the effective limit: the configured one, or for desaturation
	// the frozen baseline minus the drop.
	Limit float64
	// Baseline is the running baseline frozen at onset (desaturation only; NaN otherwise).
	Baseline float64
	AckedBy  string  // who acknowledged ("" if nobody yet)
	AckedS   float64 // when (NaN if not acknowledged)
	// AnnouncedPaused is true when the announcement fell inside a pause: it was
	// logged but no alarm signal was generated at the time.
	AnnouncedPaused bool
}

// Announced reports whether the alarm condition was announced.
func (ep *Episode) Announced() bool { return !math.IsNaN(ep.AnnouncedS) }

// Event is one transition emitted by an Engine. Episode is a copy of the
// episode after the transition (zero for Paused and Resumed).
type Event struct {
	Type    EventType
	T       float64 // seconds
	Device  string
	Episode Episode
	Who     string  // Acknowledged, Paused, Resumed: the operator ("" for an expired pause)
	Until   float64 // Paused: end of the pause (seconds)
	// Paused is true when alarm signals are paused for this stream at T: the
	// event must be logged but not announced to people.
	Paused bool
}

// Label returns the readable label of an alarm condition as the gateway
// reports it (a profile's condition name, by default the kind's name, e.g.
// "spo2_low" -> "SpO2 low"); a condition the profile named itself is
// returned as it is. It is the one table of labels for every view (CLI
// and web page).
func Label(condition string) string {
	if k, err := ParseKind(condition); err == nil {
		return k.Label()
	}
	return condition
}
