package sim

import (
	"fmt"
	"io"
	"time"

	"google.golang.org/grpc"

	"github.com/pulsefleet/pulsefleet/internal/sim/scenario"
)

// Mode is what devices send: raw chunks or per-second summaries.
type Mode string

// Modes.
const (
	ModeRaw     Mode = "raw"
	ModeSummary Mode = "summary"
)

// Options describe a fleet run. Zero values take the defaults stated.
type Options struct {
	// Gateway is the gRPC address (host:port) devices connect to. Required.
	Gateway string
	// Fallbacks are more gateway addresses of the same fleet: a device that
	// cannot reach the gateway it uses (a dead member of a fleet on etcd,
	// whose devices it had been redirected to) tries the next of Gateway
	// and Fallbacks in turn; the gateway it reaches redirects it to the
	// device's owner. Empty = Gateway only.
	Fallbacks []string
	// Scenario is the fleet and its script; nil = scenario.Generic(Devices,
	// IDPrefix, Seed), unscripted seed-derived patients.
	Scenario *scenario.Scenario
	// Devices is the fleet size when Scenario is nil, 1..100000.
	Devices int
	// IDPrefix names generic devices (PREFIX-0001 ...); "" = "sim".
	IDPrefix string
	// Mode is what devices send unless their scenario entry says otherwise;
	// "" = the scenario's mode, else raw.
	Mode Mode
	// RateHz is the raw sample rate in hertz, 25..1000; 0 = the scenario's,
	// else 100. Summary devices send one message per device second.
	RateHz float64
	// Chunk is samples per raw chunk, 1..1000; 0 = 25.
	Chunk int
	// Duration is how long devices send, wall time; 0 = the scenario's
	// duration divided by Speed, and when that is 0 too, until ctx ends.
	Duration time.Duration
	// Speed is scenario seconds per wall second (time compression),
	// 0.01..100000; 0 = the scenario's, else 1.
	Speed float64
	// Seed derives every device's patient, clock drift and faults.
	Seed uint64
	// Start is the device clock at scenario time 0; zero = the wall clock
	// when Run starts, or with Speed > 1 as far before it as the device
	// clocks gain over the run (scenario time covered minus wall time), so
	// they reach the wall clock when the run ends and are never ahead of a
	// gateway's clock (it refuses device times more than 5 s ahead). An
	// open-ended compressed run covers 24 h of scenario time that way.
	Start time.Time

	// DropEvery drops each device's stream about this often (wall time,
	// +-20 % per drop, phases spread over the fleet); 0 = never.
	DropEvery time.Duration
	// CorruptRate is the share of data messages sent corrupt, 0..1.
	CorruptRate float64
	// ClockDriftPPM spreads device clock drift uniformly over +-this many
	// parts per million, 0..100000; 0 = exact clocks.
	ClockDriftPPM float64

	// Token is sent by every device as "authorization: Bearer TOKEN"; ""
	// = none. Tokens (device id -> token) takes precedence per device.
	Token  string
	Tokens map[string]string

	// DevicesPerConn is how many devices share one gRPC connection; 0 = 500.
	DevicesPerConn int
	// Workers is the number of goroutines generating and sending chunks;
	// 0 = between 1 and 32 depending on the fleet size.
	Workers int
	// MaxBuffered is how many unacknowledged data messages a device keeps;
	// beyond it the oldest is dropped and counted; 0 = 6000.
	MaxBuffered int
	// Drain is how long to wait after sending stops for the last
	// acknowledgements; 0 = 10 s; negative = do not wait.
	Drain time.Duration
	// Progress receives one line every ProgressEvery (0 = 5 s); nil = none.
	Progress      io.Writer
	ProgressEvery time.Duration
	// DialOptions are added to every connection (after the insecure
	// transport credentials the simulator uses by default).
	DialOptions []grpc.DialOption
}

func (o Options) check() error {
	switch {
	case o.Gateway == "":
		return fmt.Errorf("gateway: empty, want host:port")
	case o.Scenario == nil && (o.Devices < 1 || o.Devices > 100000):
		return fmt.Errorf("devices: %d, want 1..100000", o.Devices)
	case o.Mode != "" && o.Mode != ModeRaw && o.Mode != ModeSummary:
		return fmt.Errorf("mode: %q, want raw or summary", o.Mode)
	case o.RateHz != 0 && !(o.RateHz >= 25 && o.RateHz <= 1000):
		return fmt.Errorf("rate: %v Hz, want 25..1000", o.RateHz)
	case o.Chunk < 0 || o.Chunk > 1000:
		return fmt.Errorf("chunk: %d samples, want 1..1000", o.Chunk)
	case o.Duration < 0:
		return fmt.Errorf("duration: %v, want 0 or more", o.Duration)
	case o.Speed != 0 && !(o.Speed >= 0.01 && o.Speed <= 100000):
		return fmt.Errorf("speed: %v, want 0.01..100000", o.Speed)
	case o.DropEvery < 0:
		return fmt.Errorf("drop-every: %v, want 0 (never) or more", o.DropEvery)
	case !(o.CorruptRate >= 0 && o.CorruptRate <= 1):
		return fmt.Errorf("corrupt-rate: %v, want 0..1", o.CorruptRate)
	case !(o.ClockDriftPPM >= 0 && o.ClockDriftPPM <= 100000):
		return fmt.Errorf("clock-drift-ppm: %v, want 0..100000", o.ClockDriftPPM)
	case o.DevicesPerConn < 0:
		return fmt.Errorf("devices per connection: %d, want 0 (500) or more", o.DevicesPerConn)
	case o.Workers < 0:
		return fmt.Errorf("workers: %d, want 0 (automatic) or more", o.Workers)
	case o.MaxBuffered < 0:
		return fmt.Errorf("max buffered: %d, want 0 (6000) or more", o.MaxBuffered)
	}
	if o.Scenario != nil {
		if len(o.Scenario.Devices) == 0 {
			return fmt.Errorf("scenario %q: no devices", o.Scenario.Name)
		}
		for i, d := range o.Scenario.Devices {
			if d.Mode != "" && d.Mode != string(ModeRaw) && d.Mode != string(ModeSummary) {
				return fmt.Errorf("scenario devices[%d].mode: %q, want raw or summary", i, d.Mode)
			}
		}
	}
	return nil
}

// Report is the outcome of a run; its JSON form is the `sim` command's last
// line. Frames are data messages (raw chunks or summaries), each sequence
// number counted once.
type Report struct {
	Devices      int     `json:"devices"`
	FramesSent   uint64  `json:"frames_sent"`   // distinct data messages handed to a stream at least once (counted before the send, so never below frames_acked)
	FramesAcked  uint64  `json:"frames_acked"`  // distinct valid messages the gateway confirmed durable (Ack, Welcome or stale rejection)
	SamplesSent  uint64  `json:"samples_sent"`  // samples in frames_sent (a summary counts as one)
	Rejected     uint64  `json:"rejected"`      // distinct frames rejected for a reason other than stale sequence
	AckP50Ms     float64 `json:"ack_p50_ms"`    // first send to covering Ack, median
	AckP99Ms     float64 `json:"ack_p99_ms"`    // and 99th percentile
	SamplesAcked uint64  `json:"samples_acked"` // samples in frames_acked
	// SamplesPerS is samples_acked per second of sending time, or of the
	// time until the last acknowledgement when that came later (a target
	// that falls behind is measured at the rate it caught up).
	SamplesPerS      float64 `json:"samples_per_s"`
	CorruptSent      uint64  `json:"corrupt_sent"`      // corrupt frames generated and sent
	CorruptAcked     uint64  `json:"corrupt_acked"`     // corrupt frames an Ack covered without a rejection: the peer accepted garbage
	CorruptSkipped   uint64  `json:"corrupt_skipped"`   // corrupt frames the peer moved past (Welcome or stale) without a rejection seen
	RejectedValid    uint64  `json:"rejected_valid"`    // valid frames rejected for a reason other than stale
	Stale            uint64  `json:"stale"`             // stale-sequence rejections received
	RejectedOther    uint64  `json:"rejected_other"`    // rejections of frames already settled or unknown (repeats after a resend, status)
	RateLimited      uint64  `json:"rate_limited"`      // rate-limit rejections: the device held off and resent from that frame
	DuplicatesResent uint64  `json:"duplicates_resent"` // sends of a frame sent before
	Reconnects       uint64  `json:"reconnects"`        // streams opened after a device's first
	DropsInjected    uint64  `json:"drops_injected"`    // streams cut by --drop-every
	Redirects        uint64  `json:"redirects"`
	StreamErrors     uint64  `json:"stream_errors"`    // streams that ended with an error not caused by the simulator
	Renumbered       uint64  `json:"renumbered"`       // devices whose numbering continued after the gateway's (id known from an earlier run)
	ResumeRegress    uint64  `json:"resume_regressed"` // Welcomes below what had been acknowledged: acknowledged data lost
	OverflowDropped  uint64  `json:"overflow_dropped"` // unacknowledged frames dropped from a full buffer
	UnackedAtEnd     uint64  `json:"unacked_at_end"`   // frames still unacknowledged when the run ended
	StatusesSent     uint64  `json:"statuses_sent"`
	DurationS        float64 `json:"duration_s"` // sending time, wall seconds
	Speed            float64 `json:"speed"`
	LastError        string  `json:"last_error,omitempty"`
	// PerDevice holds each device's acknowledged counts, by device id.
	PerDevice map[string]DeviceReport `json:"-"`
}

// DeviceReport is one device's acknowledged data.
type DeviceReport struct {
	FramesAcked  uint64
	SamplesAcked uint64
	AckedThrough uint64 // highest sequence number covered by an Ack or Welcome
	Mode         Mode
}
