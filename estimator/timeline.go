package estimator

import (
	"fmt"
	"math"
)

// MaxClockJumpMS is how far, in milliseconds, a chunk's device time may
// differ from the time its predecessor's samples predict before Timeline
// restarts the estimator: a second's worth of samples is then missing (or
// repeated), and bridging them would fold unrelated light into a beat.
const MaxClockJumpMS = 1000

// TimedEstimate is an Estimate placed on the device clock.
type TimedEstimate struct {
	// TimeMS is the end of the estimate's second on the device clock, Unix
	// milliseconds: t0 + (Second+1) x 1000, where t0 is the device time of
	// the first sample after the estimator's last (re)start.
	TimeMS int64
	Estimate
}

// Timeline runs one device's Stream over timestamped chunks of raw samples
// and places each estimate on the device clock. It restarts the stream (the
// estimate's Second counts from 0 again and t0 moves to the chunk's time)
// when:
//
//   - the chunk's sample rate differs from the previous chunk's;
//   - the chunk's device time differs by more than MaxClockJumpMS from the
//     previous chunk's time plus its samples' duration (samples missing, a
//     reconnect, a clock reset);
//   - Gap was called since the previous chunk (the caller knows chunks are
//     missing, e.g. from a sequence number that skipped).
//
// A chunk that stays within MaxClockJumpMS continues the stream without
// restarting: device clocks drift and jitter, and the estimator counts time
// in samples, so the jitter does not accumulate in TimeMS within one run.
//
// It is what the gateway does per raw stream and what tune does over stored
// raw captures, so a trend re-estimated from captures matches the live one
// when the configuration does. Pure (no clock, no I/O) and not safe for
// concurrent use; it does not allocate per chunk once its buffers have grown
// to the largest chunk and the caller's out slice has capacity.
type Timeline struct {
	cfg      Config // SampleRateHz is set from the chunks
	st       *Stream
	restart  bool    // the next chunk starts the stream over
	t0MS     int64   // device time of sample 0 of the current run
	nextMS   float64 // expected device time of the next chunk's first sample
	est      []Estimate
	red, ir  []float64 // PushCodes conversion buffers
	amb      []float64
	restarts int
}

// NewTimeline returns a timeline whose stream uses cfg's ADCBits,
// Calibration and AveragingS. cfg.SampleRateHz must be 0: each chunk
// carries its own rate.
func NewTimeline(cfg Config) (*Timeline, error) {
	if cfg.SampleRateHz != 0 {
		return nil, fmt.Errorf("estimator: timeline: SampleRateHz: %v, want 0 (each chunk carries its rate)", cfg.SampleRateHz)
	}
	probe := cfg
	probe.SampleRateHz = MinSampleRateHz
	if err := probe.Validate(); err != nil {
		return nil, fmt.Errorf("estimator: timeline: %w", err)
	}
	return &Timeline{cfg: cfg, restart: true}, nil
}

// Gap makes the next chunk restart the stream: samples are missing
// between the last chunk and the next even if the device clock says
// otherwise.
func (t *Timeline) Gap() { t.restart = true }

// Restarts is the number of times the stream was started or restarted.
func (t *Timeline) Restarts() int { return t.restarts }

// Push feeds one chunk: deviceTimeMS is the device time (Unix ms) of its
// first sample, rateHz its sample rate, red, ir and ambient as for
// Stream.Push (min(len(red), len(ir)) samples are used). It appends every
// second the chunk completes to out and returns it. A rate the estimator
// rejects is an error naming it; the chunk is dropped and the next chunk
// starts the stream over.
func (t *Timeline) Push(deviceTimeMS int64, rateHz float64, red, ir, ambient []float64, out []TimedEstimate) ([]TimedEstimate, error) {
	n := min(len(red), len(ir))
	if t.st == nil || rateHz != t.cfg.SampleRateHz || t.restart || math.Abs(float64(deviceTimeMS)-t.nextMS) > MaxClockJumpMS {
		if err := t.start(rateHz); err != nil {
			return out, err
		}
		t.t0MS = deviceTimeMS
	}
	t.est = t.st.Push(red, ir, ambient, t.est[:0])
	t.nextMS = float64(deviceTimeMS) + float64(n)*1000/rateHz
	for _, e := range t.est {
		out = append(out, TimedEstimate{TimeMS: t.t0MS + (e.Second+1)*1000, Estimate: e})
	}
	return out, nil
}

// PushCodes is Push for samples as unsigned ADC codes (as devices send and
// the store keeps them), converted into buffers the timeline reuses.
// ambient is used when it holds at least min(len(red), len(ir)) samples.
func (t *Timeline) PushCodes(deviceTimeMS int64, rateHz float64, red, ir, ambient []uint32, out []TimedEstimate) ([]TimedEstimate, error) {
	n := min(len(red), len(ir))
	t.red = codes(t.red, red[:n])
	t.ir = codes(t.ir, ir[:n])
	var am []float64
	if len(ambient) >= n {
		t.amb = codes(t.amb, ambient[:n])
		am = t.amb
	}
	return t.Push(deviceTimeMS, rateHz, t.red, t.ir, am, out)
}

// codes converts src into buf, growing it when needed.
func codes(buf []float64, src []uint32) []float64 {
	if cap(buf) < len(src) {
		buf = make([]float64, len(src))
	}
	buf = buf[:len(src)]
	for i, v := range src {
		buf[i] = float64(v)
	}
	return buf
}

// start (re)starts the stream at rateHz: a new Stream when the rate
// changed, else a Reset of the current one.
func (t *Timeline) start(rateHz float64) error {
	if t.st != nil && rateHz == t.cfg.SampleRateHz {
		t.st.Reset()
	} else {
		cfg := t.cfg
		cfg.SampleRateHz = rateHz
		st, err := New(cfg)
		if err != nil {
			t.st, t.restart = nil, true
			return fmt.Errorf("timeline chunk: %w", err)
		}
		t.st, t.cfg = st, cfg
	}
	t.restart = false
	t.restarts++
	return nil
}
