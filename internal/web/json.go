package web

import (
	"strings"

	"google.golang.org/protobuf/encoding/protojson"
	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/alarms"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The page's JSON carries the API's own messages through protojson, with
// the .proto field names (device_id, last_seen_unix_ms, ...): one set of
// names for the gRPC API, the CLI's --json output and the page. protojson
// writes 64-bit integers as strings and leaves out fields at their zero
// value and unset optional values (the page reads an absent value as "no
// value", never as zero). docs/contracts.md, "The web page's JSON", lists
// the envelope around them.

// pj writes and reads messages of the page's JSON.
var (
	pjOut = protojson.MarshalOptions{UseProtoNames: true}
	pjIn  = protojson.UnmarshalOptions{DiscardUnknown: true}
)

// Proto is an API message inside the page's JSON, written with protojson.
type Proto[M proto.Message] struct{ M M }

// P wraps m for the page's JSON.
func P[M proto.Message](m M) Proto[M] { return Proto[M]{m} }

// MarshalJSON writes the message with protojson (null when nil).
func (p Proto[M]) MarshalJSON() ([]byte, error) {
	if !p.M.ProtoReflect().IsValid() {
		return []byte("null"), nil
	}
	return pjOut.Marshal(p.M)
}

// UnmarshalJSON reads a message written by MarshalJSON (Go clients of the
// page: the gateway's tests).
func (p *Proto[M]) UnmarshalJSON(b []byte) error {
	p.M = p.M.ProtoReflect().Type().New().Interface().(M)
	if string(b) == "null" {
		return nil
	}
	return pjIn.Unmarshal(b, p.M)
}

// Spark is a device's SpO2 over the last minutes: the mean per step, null
// where the step had no valid value.
type Spark struct {
	StartMS int64      `json:"start_ms"`
	StepMS  int64      `json:"step_ms"`
	SpO2    []*float64 `json:"spo2"`
}

// Limit is one threshold of the alarm profile a device runs, as the charts
// draw it: the alarm limit, where the condition clears (the limit moved by
// the hysteresis), and the escalation depth.
type Limit struct {
	Condition string `json:"condition"` // the profile's condition name
	Label     string `json:"label"`     // alarms.Label of it
	Kind      string `json:"kind"`      // spo2_low, pulse_high, ...
	// Quantity is the chart it belongs on: spo2, pulse, sqi or pi.
	Quantity string `json:"quantity"`
	// Below is true for low limits (the alarm is below Limit).
	Below    bool     `json:"below"`
	Limit    float64  `json:"limit"`
	ClearAt  float64  `json:"clear_at"` // Limit plus (low) or minus (high) the hysteresis
	Priority string   `json:"priority"` // low, medium, high
	Escalate *float64 `json:"escalate_at,omitempty"`
	// EscalatePriority is the priority after escalation ("" without one).
	EscalatePriority string `json:"escalate_priority,omitempty"`
	Latching         bool   `json:"latching,omitempty"`
}

// Profile is the alarm profile a device runs, as the page shows it.
type Profile struct {
	Name   string  `json:"name"`
	Origin string  `json:"origin"` // "device" (its own) or "default"
	Limits []Limit `json:"limits"`
}

// limitsOf lists the thresholds of p that a chart can draw (desaturation
// is relative to a running baseline, and signal_lost, device_offline and
// device_clock_fault have no limit).
func limitsOf(p *alarms.Profile) []Limit {
	out := []Limit{}
	for _, c := range p.Conditions {
		l := Limit{Condition: c.ConditionName(), Label: alarms.Label(c.ConditionName()), Kind: c.Kind.String(),
			Limit: c.Limit, Priority: c.Priority.String(), Latching: c.Latching}
		switch c.Kind {
		case alarms.SpO2Low, alarms.SpO2High:
			l.Quantity = "spo2"
		case alarms.PulseLow, alarms.PulseHigh:
			l.Quantity = "pulse"
		case alarms.SignalPoor:
			l.Quantity = "sqi"
		case alarms.PerfusionLow:
			l.Quantity = "pi"
		default:
			continue
		}
		l.Below = c.Kind == alarms.SpO2Low || c.Kind == alarms.PulseLow || c.Kind == alarms.SignalPoor || c.Kind == alarms.PerfusionLow
		l.ClearAt = c.Limit - c.Hysteresis
		if l.Below {
			l.ClearAt = c.Limit + c.Hysteresis
		}
		if e := c.Escalate; e != nil {
			if v := e.Below; l.Below && v != 0 {
				l.Escalate = &v
			}
			if v := e.Above; !l.Below && v != 0 {
				l.Escalate = &v
			}
			l.EscalatePriority = e.Priority.String()
		}
		out = append(out, l)
	}
	return out
}

// conditionLabels maps every condition kind and every condition named in
// devs and eps to its readable label (alarms.Label, the CLI's table too).
func conditionLabels(devs []*pb.Device, eps []*pb.Episode) map[string]string {
	out := map[string]string{}
	for k := alarms.SpO2Low; k.String() != "" && !strings.HasPrefix(k.String(), "kind("); k++ {
		out[k.String()] = k.Label()
	}
	for _, d := range devs {
		for _, c := range d.GetActiveConditions() {
			out[c] = alarms.Label(c)
		}
	}
	for _, e := range eps {
		out[e.GetCondition()] = alarms.Label(e.GetCondition())
	}
	return out
}
