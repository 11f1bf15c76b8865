package web

import (
	"encoding/json"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The limits the charts draw are the profile's own, with the value at which
// each condition clears (limit moved by the hysteresis, away from the alarm
// side) and the escalation depth; conditions without a fixed limit are left
// out.
func TestLimitsOfProfile(t *testing.T) {
	p, err := alarms.ParseProfile([]byte(`name: limits-test
conditions:
  - kind: spo2_low
    limit: 88
    hysteresis: 2
    delay: 10s
    priority: medium
    escalate: {below: 82, priority: high}
  - kind: pulse_high
    limit: 130
    hysteresis: 5
    delay: 10s
    priority: low
  - kind: desaturation
    limit: 4
    delay: 10s
    priority: low
  - kind: signal_lost
    delay: 20s
    priority: low
`))
	if err != nil {
		t.Fatal(err)
	}
	got := limitsOf(p)
	if len(got) != 2 {
		t.Fatalf("limits %+v, want spo2_low and pulse_high only", got)
	}
	s, pu := got[0], got[1]
	if s.Quantity != "spo2" || !s.Below || s.Limit != 88 || s.ClearAt != 90 || s.Escalate == nil || *s.Escalate != 82 || s.EscalatePriority != "high" || s.Label != "SpO2 low" {
		t.Errorf("spo2_low limit %+v", s)
	}
	if pu.Quantity != "pulse" || pu.Below || pu.Limit != 130 || pu.ClearAt != 125 || pu.Escalate != nil || pu.Priority != "low" {
		t.Errorf("pulse_high limit %+v", pu)
	}
}

// API messages in the page's JSON: protojson with the .proto names, 64-bit
// integers as strings, unset optional values left out, and back.
func TestProtoInPageJSON(t *testing.T) {
	v := 93.5
	in := struct {
		D Proto[*pb.Device] `json:"d"`
		N Proto[*pb.Device] `json:"n"`
	}{D: P(&pb.Device{DeviceId: "bed-1", LastSeenUnixMs: 1_800_000_000_123, Latest: &pb.TrendPoint{Spo2Pct: &v}}), N: P[*pb.Device](nil)}
	b, err := json.Marshal(in)
	if err != nil {
		t.Fatal(err)
	}
	js := string(b)
	for _, want := range []string{`"device_id":"bed-1"`, `"last_seen_unix_ms":"1800000000123"`, `"spo2_pct":93.5`, `"n":null`} {
		if !strings.Contains(js, want) {
			t.Errorf("%s lacks %s", js, want)
		}
	}
	if strings.Contains(js, "pulse_bpm") || strings.Contains(js, "connected") {
		t.Errorf("%s carries unset values", js)
	}
	var out struct {
		D Proto[*pb.Device] `json:"d"`
	}
	if err := json.Unmarshal(b, &out); err != nil {
		t.Fatal(err)
	}
	if out.D.M.GetDeviceId() != "bed-1" || out.D.M.GetLatest().GetSpo2Pct() != 93.5 || out.D.M.GetLatest().PulseBpm != nil {
		t.Errorf("round trip %v", out.D.M)
	}
}
