package store

import (
	"encoding/json"
	"fmt"
)

// Device is what the store keeps about a device between sessions.
type Device struct {
	ID          string            `json:"id"`
	Index       uint32            `json:"index"` // dense number used in ledger keys; assigned by the store
	Model       string            `json:"model,omitempty"`
	Firmware    string            `json:"firmware,omitempty"`
	Mode        string            `json:"mode,omitempty"` // "raw" or "summary"
	Labels      map[string]string `json:"labels,omitempty"`
	RedNM       float64           `json:"red_nm,omitempty"`
	IRNM        float64           `json:"ir_nm,omitempty"`
	ADCBits     uint32            `json:"adc_bits,omitempty"`
	Calibration string            `json:"calibration,omitempty"` // applied, "name@vN"
	FirstSeenMS int64             `json:"first_seen_ms"`
	LastSeenMS  int64             `json:"last_seen_ms"`
	Sessions    uint64            `json:"sessions"`    // streams opened
	BatteryPct  float64           `json:"battery_pct"` // last reported; negative when unknown
	DriftPPM    float64           `json:"drift_ppm"`   // last estimate of device clock drift
	// MovedTo is the gateway of the fleet the device moved to when it left
	// this one (its fence went to another member; empty while it is here
	// or never left), MovedMS when (gateway clock).
	MovedTo string `json:"moved_to,omitempty"`
	MovedMS int64  `json:"moved_ms,omitempty"`
}

// Cursor is a device's delivery position and counters. It is written with
// every batch that accepts data from the device, so it is small and binary
// (the Device record is written only when the device's description changes).
type Cursor struct {
	Device     string
	LastSeq    uint64 // highest durable sequence number: the resume point
	Chunks     uint64 // data messages accepted
	Samples    uint64 // raw samples accepted (summaries count 0)
	Lost       uint64 // sequence numbers skipped
	Duplicates uint64 // stale sequence numbers received
	Rejected   uint64 // messages rejected for any reason
	Late       uint64 // accepted messages far behind the gateway clock
	LastSeenMS int64  // gateway clock at the last accepted message
	// LastDeviceMS is the device time of the message at LastSeq (0 =
	// unknown): a later message must carry a later device time, so a
	// resend of stored device times is refused as stale (internal/ingest/doc.go).
	LastDeviceMS int64
}

// Point is one trend point: one second of a device's values. NaN marks a
// missing value; values are stored as float32.
type Point struct {
	Device string // set in batches and in exports; per-device queries may leave it empty
	TimeMS int64  // end of the second, device clock, Unix milliseconds
	SpO2   float64
	Pulse  float64
	PI     float64
	SQI    float64
	Ratio  float64
	Flags  uint16
	Source uint8 // 1 gateway estimate, 2 device summary
}

// Chunk is the ledger record of one accepted data message.
type Chunk struct {
	Device       string
	Seq          uint64
	DeviceTimeMS int64
	ArrivalMS    int64
	Samples      uint32 // raw samples in the message (0 for summaries)
}

// Session is one stream of a device.
type Session struct {
	Device  string `json:"device"`
	StartMS int64  `json:"start_ms"`
	EndMS   int64  `json:"end_ms,omitempty"` // 0 while open (or if the gateway died)
	Remote  string `json:"remote,omitempty"`
	Reason  string `json:"reason,omitempty"` // why it ended
	Mode    string `json:"mode,omitempty"`
}

// Episode is a stored alarm episode (times in Unix ms, 0 = not happened).
type Episode struct {
	ID          uint64  `json:"id"`
	Device      string  `json:"device"`
	Condition   string  `json:"condition"`
	Priority    string  `json:"priority"`
	OnsetMS     int64   `json:"onset_ms"`
	AnnouncedMS int64   `json:"announced_ms,omitempty"`
	EscalatedMS int64   `json:"escalated_ms,omitempty"`
	EndedMS     int64   `json:"ended_ms,omitempty"`
	MinSpO2     float64 `json:"min_spo2"` // -1 when no valid value
	// Limit is the condition's effective limit in its unit (for
	// desaturation the frozen baseline minus the drop); 0 when it has none
	// or the episode was stored before limits were.
	Limit       float64 `json:"limit,omitempty"`
	DeficitPctS float64 `json:"deficit_pct_s"`
	AckedBy     string  `json:"acked_by,omitempty"`
	AckedMS     int64   `json:"acked_ms,omitempty"`
	Active      bool    `json:"active"`
	Profile     string  `json:"profile,omitempty"`
	// MovedTo: the episode was open when its device moved to this gateway
	// of the fleet, where it goes on (not active here, not ended).
	MovedTo string `json:"moved_to,omitempty"`
}

// AuditEntry is one line of the audit log.
type AuditEntry struct {
	ID     uint64 `json:"id"` // assigned by the store
	TimeMS int64  `json:"time_ms"`
	Actor  string `json:"actor"`
	Action string `json:"action"`
	Device string `json:"device,omitempty"`
	Detail string `json:"detail,omitempty"`
	Remote string `json:"remote,omitempty"`
}

// RawCapture is one captured raw chunk.
type RawCapture struct {
	Device       string
	Seq          uint64
	DeviceTimeMS int64
	RateHz       float64
	Red, IR      []uint32
	Ambient      []uint32 // may be empty
}

func encJSON(v any) ([]byte, error) {
	b, err := json.Marshal(v)
	if err != nil {
		return nil, err
	}
	return append([]byte{vJSON}, b...), nil
}

func decJSON(b []byte, v any) error {
	if len(b) == 0 || b[0] != vJSON {
		return fmt.Errorf("unknown record version %v", firstByte(b))
	}
	return json.Unmarshal(b[1:], v)
}

func firstByte(b []byte) int {
	if len(b) == 0 {
		return -1
	}
	return int(b[0])
}
