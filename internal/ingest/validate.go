package ingest

import (
	"fmt"
	"math"
	"strings"

	"github.com/pulsefleet/pulsefleet/internal/ids"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"google.golang.org/protobuf/proto"
)

// Bounds of a device's messages. They are part of the API (see ingest.proto).
const (
	minRateHz      = 25
	maxRateHz      = 1000
	minADCBits     = 8
	MaxADCBits     = 24
	minWavelength  = 500
	maxWavelength  = 1100
	maxIDLen       = ids.MaxLen
	maxLabels      = 8
	maxLabelKeyLen = 32
	maxLabelValLen = 64
	// maxClockSkew bounds how far a device time may be behind the gateway
	// clock: older is refused (a device with no clock must set one). The
	// bound ahead is ClockAheadMax; both are applied by admitTime (clock.go),
	// which raises device_clock_fault for every message it refuses.
	maxClockSkew = 366 * 24 * 3600 * 1000
)

// reject builds a Rejection naming the field and the bound.
func reject(seq uint64, reason pb.RejectReason, field, format string, args ...any) *pb.Rejection {
	return &pb.Rejection{Sequence: seq, Reason: reason, Field: field, Detail: fmt.Sprintf(format, args...)}
}

func invalid(seq uint64, field, format string, args ...any) *pb.Rejection {
	return reject(seq, pb.RejectReason_REJECT_REASON_INVALID_FIELD, field, format, args...)
}

// validID checks a device id: 1..64 of [A-Za-z0-9._-] (internal/ids).
func validID(field, id string) error { return ids.Check(field, id) }

// validateIntroduction checks an introduction and fills defaults.
func validateIntroduction(in *pb.Introduction) *pb.Rejection {
	if err := validID("introduction.device_id", in.GetDeviceId()); err != nil {
		return invalid(0, "introduction.device_id", "%v", err)
	}
	for _, f := range []struct {
		name string
		v    string
	}{{"introduction.model", in.GetModel()}, {"introduction.firmware", in.GetFirmware()}, {"introduction.calibration_id", in.GetCalibrationId()}} {
		if len(f.v) > maxIDLen {
			return invalid(0, f.name, "length %d, want 0..%d", len(f.v), maxIDLen)
		}
	}
	switch in.GetMode() {
	case pb.Mode_MODE_RAW, pb.Mode_MODE_SUMMARY:
	default:
		return invalid(0, "introduction.mode", "%v, want MODE_RAW or MODE_SUMMARY", in.GetMode())
	}
	if in.RedWavelengthNm == 0 {
		in.RedWavelengthNm = 660
	}
	if in.IrWavelengthNm == 0 {
		in.IrWavelengthNm = 940
	}
	for _, f := range []struct {
		name string
		v    float64
	}{{"introduction.red_wavelength_nm", in.RedWavelengthNm}, {"introduction.ir_wavelength_nm", in.IrWavelengthNm}} {
		if !(f.v >= minWavelength && f.v <= maxWavelength) {
			return invalid(0, f.name, "%v nm, want %d..%d", f.v, minWavelength, maxWavelength)
		}
	}
	if in.GetMode() == pb.Mode_MODE_RAW && (in.AdcBits < minADCBits || in.AdcBits > MaxADCBits) {
		return invalid(0, "introduction.adc_bits", "%d, want %d..%d in raw mode", in.AdcBits, minADCBits, MaxADCBits)
	}
	if len(in.Labels) > maxLabels {
		return invalid(0, "introduction.labels", "%d labels, want at most %d", len(in.Labels), maxLabels)
	}
	for k, v := range in.Labels {
		if len(k) < 1 || len(k) > maxLabelKeyLen {
			return invalid(0, "introduction.labels", "key %q: length %d, want 1..%d", k, len(k), maxLabelKeyLen)
		}
		if len(v) > maxLabelValLen {
			return invalid(0, "introduction.labels", "value of %q: length %d, want 0..%d", k, len(v), maxLabelValLen)
		}
	}
	return validateCapabilities(in.GetCapabilities())
}

// validateRaw checks a raw chunk against the device's declared sensor.
// Its device time is checked by admitTime (clock.go).
func validateRaw(c *pb.RawChunk, adcBits uint32, maxSamples int) *pb.Rejection {
	seq := c.GetSequence()
	if seq == 0 {
		return invalid(0, "raw_chunk.sequence", "0, want >= 1")
	}
	if r := c.GetSampleRateHz(); !(r >= minRateHz && r <= maxRateHz) {
		return invalid(seq, "raw_chunk.sample_rate_hz", "%v Hz, want %d..%d", r, minRateHz, maxRateHz)
	}
	n := len(c.GetRed())
	if n < 1 || n > maxSamples {
		return invalid(seq, "raw_chunk.red", "%d samples, want 1..%d", n, maxSamples)
	}
	if len(c.GetIr()) != n {
		return invalid(seq, "raw_chunk.ir", "%d samples, want %d (as many as red)", len(c.GetIr()), n)
	}
	if a := len(c.GetAmbient()); a != 0 && a != n {
		return invalid(seq, "raw_chunk.ambient", "%d samples, want 0 or %d (as many as red)", a, n)
	}
	limit := uint32(1)<<adcBits - 1
	for _, ch := range []struct {
		name string
		v    []uint32
	}{{"raw_chunk.red", c.GetRed()}, {"raw_chunk.ir", c.GetIr()}, {"raw_chunk.ambient", c.GetAmbient()}} {
		for i, x := range ch.v {
			if x > limit {
				return invalid(seq, ch.name, "sample %d is %d, want 0..%d (%d-bit ADC)", i, x, limit, adcBits)
			}
		}
	}
	if d := c.GetLedDriveMa(); !(d >= 0 && d <= 255) {
		return invalid(seq, "raw_chunk.led_drive_ma", "%v mA, want 0..255", d)
	}
	if g := c.GetGain(); !(g >= 0 && g <= 1000) {
		return invalid(seq, "raw_chunk.gain", "%v, want 0..1000", g)
	}
	return nil
}

// validateSummary checks a device-computed second. Its device time is
// checked by admitTime (clock.go).
func validateSummary(s *pb.Summary) *pb.Rejection {
	seq := s.GetSequence()
	if seq == 0 {
		return invalid(0, "summary.sequence", "0, want >= 1")
	}
	check := func(field string, v *float64, lo, hi float64, unit string) *pb.Rejection {
		if v == nil {
			return nil
		}
		if math.IsNaN(*v) || math.IsInf(*v, 0) || *v < lo || *v > hi {
			return invalid(seq, field, "%v%s, want %v..%v (omit the field when there is no value)", *v, unit, lo, hi)
		}
		return nil
	}
	if r := check("summary.spo2_pct", s.Spo2Pct, 0, 100, " %"); r != nil {
		return r
	}
	if r := check("summary.pulse_bpm", s.PulseBpm, 0, 350, " /min"); r != nil {
		return r
	}
	if r := check("summary.pi_pct", s.PiPct, 0, 100, " %"); r != nil {
		return r
	}
	if r := check("summary.quality", s.Quality, 0, 1, ""); r != nil {
		return r
	}
	return nil
}

// validateStatus checks a housekeeping report.
func validateStatus(s *pb.DeviceStatus) *pb.Rejection {
	if b := s.GetBatteryPct(); math.IsNaN(b) || b > 100 {
		return invalid(0, "status.battery_pct", "%v, want 0..100 (negative = unknown)", b)
	}
	if c := s.GetTemperatureC(); !(c >= -40 && c <= 125) {
		return invalid(0, "status.temperature_c", "%v °C, want -40..125", c)
	}
	if l := s.GetLinkQuality(); math.IsNaN(l) || l > 1 {
		return invalid(0, "status.link_quality", "%v, want 0..1 (negative = unknown)", l)
	}
	return nil
}

// LargestValidMessage is the encoded size of the largest message a device
// can send that passes validation: a raw chunk of maxSamples samples of a
// 24-bit ADC (4-byte varints) on the red, infrared and ambient channels,
// with every other field at its largest encoding. An introduction is
// smaller (ids of 64 bytes, 8 labels of 32 + 64 bytes: about 1.2 KB), and
// so is a summary or a status.
func LargestValidMessage(maxSamples int) int {
	codes := make([]uint32, maxSamples)
	for i := range codes {
		codes[i] = 1<<MaxADCBits - 1
	}
	chunk := &pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{
		Sequence: math.MaxUint64, DeviceTimeUnixMs: math.MaxInt64, SampleRateHz: maxRateHz,
		Red: codes, Ir: codes, Ambient: codes, LedDriveMa: 255, Gain: 1000}}}
	id := strings.Repeat("x", maxIDLen)
	labels := map[string]string{}
	for i := 0; i < maxLabels; i++ {
		labels[fmt.Sprintf("%0*d", maxLabelKeyLen, i)] = strings.Repeat("v", maxLabelValLen)
	}
	intro := &pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{
		DeviceId: id, Model: id, Firmware: id, CalibrationId: id, Mode: pb.Mode_MODE_RAW, AdcBits: MaxADCBits,
		RedWavelengthNm: maxWavelength, IrWavelengthNm: maxWavelength, Labels: labels}}}
	return max(proto.Size(chunk), proto.Size(intro))
}

// DefaultMaxMessageBytes is the largest valid message plus a quarter,
// rounded up to 4 KiB.
func DefaultMaxMessageBytes(maxSamples int) int {
	n := LargestValidMessage(maxSamples) * 5 / 4
	return (n + 4095) / 4096 * 4096
}
