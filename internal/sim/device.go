package sim

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"sync"
	"sync/atomic"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
	"github.com/pulsefleet/pulsefleet/internal/sim/scenario"
	pulsefleetv1 "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// ADCBits is the converter resolution simulated raw devices declare.
const ADCBits = 18

// chunk is one data message and its delivery state. Its proto messages are
// allocated once and reused after the chunk is acknowledged.
type chunk struct {
	req  pulsefleetv1.ConnectRequest
	rawK pulsefleetv1.ConnectRequest_RawChunk
	sumK pulsefleetv1.ConnectRequest_Summary
	raw  pulsefleetv1.RawChunk
	sum  pulsefleetv1.Summary
	vals [4]float64 // summary values the optional fields point to

	seq     uint64
	samples int
	sentAt  time.Duration // since the fleet's t0, of the first send; 0 = never sent
	corrupt bool
	done    bool // rejected, or known held (stale): no longer to be sent or counted
	sending bool // a Send of it is in progress: do not recycle yet
	recycle bool // popped while sending: recycle after the Send
}

func (c *chunk) setSeq(seq uint64) {
	c.seq = seq
	c.raw.Sequence = seq
	c.sum.Sequence = seq
}

// device is one simulated device. The fields above mu are owned by the
// worker that drives the device (set before Run's goroutines start, then
// read-only elsewhere); the rest is guarded by mu, and Send on the stream by
// sendMu (lock order: sendMu, then mu).
type device struct {
	f        *fleet
	idx      int
	id       string
	mode     Mode
	track    *scenario.Track
	src      *ppgmodel.Source
	fr, fi   []float64
	rng      *rand.Rand
	drift    float64       // relative clock error, positive = device clock fast
	phase    float64       // scenario seconds before the first sample
	chunkDur float64       // device seconds per data message
	k        int64         // index of the next data message
	due      time.Duration // wall time since the fleet's t0 when message k is due
	intro    *pulsefleetv1.ConnectRequest
	token    string
	status   *pulsefleetv1.ConnectRequest
	statusV  *pulsefleetv1.DeviceStatus
	statusS  float64       // scenario seconds between status messages
	nextStat float64       // scenario time of the next status message
	nextDrop time.Duration // since t0
	battery  scenario.Battery

	online atomic.Bool
	kick   chan struct{}

	sendMu sync.Mutex

	mu           sync.Mutex
	buf          []*chunk // unacknowledged, consecutive sequence numbers from buf[head]
	head         int
	free         []*chunk
	nextSeq      uint64
	ackedThrough uint64
	sentThrough  uint64 // highest sequence number sent on the current stream
	stream       pulsefleetv1.IngestService_ConnectClient
	cancel       context.CancelFunc
	addr         string
	holdUntil    time.Duration // since t0: no data is sent before this (rate limited)
	holdOff      time.Duration // current hold after a rate-limit rejection (0 after an ack)
	welcomed     bool          // a Welcome has arrived at least once
	breakPlanned bool          // the last stream ended by breakStream was ended on purpose
	framesAcked  uint64
	samplesAcked uint64
}

func newDevice(f *fleet, idx int, sd *scenario.Device, horizon time.Duration, fleetRNG *rand.Rand) (*device, error) {
	seed := scenario.Seed(f.opts.Seed, sd.ID)
	d := &device{
		f: f, idx: idx, id: sd.ID, addr: f.opts.Gateway, nextSeq: 1,
		track:   scenario.NewTrack(sd, seed, horizon),
		rng:     rand.New(rand.NewPCG(seed, 0xdef1ce)),
		kick:    make(chan struct{}, 1),
		battery: sd.Battery,
	}
	d.mode = Mode(sd.Mode)
	if d.mode == "" {
		d.mode = f.opts.Mode
	}
	if d.mode == "" {
		d.mode = Mode(f.sc.Mode)
	}
	if d.mode == "" {
		d.mode = ModeRaw
	}
	d.drift = f.opts.ClockDriftPPM * 1e-6 * (2*d.rng.Float64() - 1)
	d.token = f.opts.Token
	if t, ok := f.opts.Tokens[sd.ID]; ok {
		d.token = t
	}
	pbMode := pulsefleetv1.Mode_MODE_RAW
	if d.mode == ModeRaw {
		d.chunkDur = float64(f.chunk) / f.rate
		cfg := ppgmodel.Config{SampleRateHz: f.rate, ADCBits: ADCBits, Seed: seed}
		if err := cfg.Validate(); err != nil {
			return nil, fmt.Errorf("device %s: ppg model: %w", sd.ID, err)
		}
		d.src = ppgmodel.New(cfg)
		d.fr, d.fi = make([]float64, f.chunk), make([]float64, f.chunk)
	} else {
		pbMode = pulsefleetv1.Mode_MODE_SUMMARY
		d.chunkDur = 1
	}
	// Devices start at random phases within their first message period so
	// the fleet's sends spread over time.
	d.phase = d.rng.Float64() * d.chunkDur
	d.due = f.wallAt(d.phase + d.chunkDur/(1+d.drift))
	model, fw := sd.Model, sd.Firmware
	if model == "" {
		model = "sim-proto"
	}
	if fw == "" {
		fw = "sim"
	}
	d.intro = &pulsefleetv1.ConnectRequest{Kind: &pulsefleetv1.ConnectRequest_Introduction{Introduction: &pulsefleetv1.Introduction{
		DeviceId: sd.ID, Model: model, Firmware: fw, RedWavelengthNm: 660, IrWavelengthNm: 940,
		AdcBits: ADCBits, Mode: pbMode, Labels: sd.Labels,
	}}}
	d.statusV = &pulsefleetv1.DeviceStatus{}
	d.status = &pulsefleetv1.ConnectRequest{Kind: &pulsefleetv1.ConnectRequest_Status{Status: d.statusV}}
	d.statusS = sd.Battery.StatusEveryS
	if d.statusS == 0 {
		d.statusS = 30
	}
	d.nextStat = d.phase + d.rng.Float64()*d.statusS
	if f.opts.DropEvery > 0 {
		d.nextDrop = time.Duration((0.5 + d.rng.Float64()) * float64(f.opts.DropEvery))
	}
	d.online.Store(true)
	return d, nil
}

// wallAt is the wall time (since t0) of scenario second s.
func (f *fleet) wallAt(s float64) time.Duration {
	return time.Duration(s / f.speed * float64(time.Second))
}

func (f *fleet) since() time.Duration {
	d := time.Since(f.t0)
	if d <= 0 {
		d = 1
	}
	return d
}

// tick makes and sends data message k; it reports whether another is due.
func (d *device) tick(now time.Duration) bool {
	f := d.f
	if f.end > 0 && d.due > f.end {
		return false
	}
	ts := d.phase + float64(d.k)*d.chunkDur/(1+d.drift) // scenario time of the first sample
	if f.scEnd > 0 && ts >= f.scEnd {
		return false
	}
	st := d.track.At(time.Duration(ts * float64(time.Second)))
	d.setOnline(!st.Offline)
	if !st.DeviceOff {
		d.generate(&st)
	}
	if ts >= d.nextStat {
		d.nextStat += d.statusS
		d.sendStatus(&st, ts)
	}
	if f.opts.DropEvery > 0 && now > d.nextDrop {
		d.nextDrop = now + time.Duration((0.8+0.4*d.rng.Float64())*float64(f.opts.DropEvery))
		if d.breakStream(nil, true) {
			f.c.drops.Add(1)
		}
	}
	d.flush(false)
	d.k++
	d.due = f.wallAt(d.phase + float64(d.k+1)*d.chunkDur/(1+d.drift))
	return true
}

// setOnline records whether the device wants a stream.
func (d *device) setOnline(on bool) {
	if d.f.draining.Load() {
		on = true
	}
	if d.online.Swap(on) == on {
		return
	}
	if on {
		select {
		case d.kick <- struct{}{}:
		default:
		}
	} else {
		d.breakStream(nil, true)
	}
}

// deviceMs is the device clock at the first sample of message k.
func (d *device) deviceMs(k int64) int64 {
	s := d.phase*(1+d.drift) + float64(k)*d.chunkDur
	return d.f.startMs + int64(math.Round(s*1000))
}

// newChunk takes a recycled chunk or makes one; only the worker calls it.
func (d *device) newChunk() *chunk {
	d.mu.Lock()
	var c *chunk
	if n := len(d.free); n > 0 {
		c = d.free[n-1]
		d.free = d.free[:n-1]
	}
	d.mu.Unlock()
	if c == nil {
		c = &chunk{}
		c.rawK.RawChunk = &c.raw
		c.sumK.Summary = &c.sum
		if d.mode == ModeRaw {
			c.req.Kind = &c.rawK
			c.raw.Red = make([]uint32, d.f.chunk)
			c.raw.Ir = make([]uint32, d.f.chunk)
		} else {
			c.req.Kind = &c.sumK
		}
	}
	c.sentAt, c.corrupt, c.done, c.sending, c.recycle = 0, false, false, false, false
	return c
}

// Vitals maps a scenario state to the PPG model's input. Motion intensity 1
// is a 4 % (absorbance x 100) rms artefact, twice a typical pulse.
func Vitals(st *scenario.State) ppgmodel.Vitals {
	return ppgmodel.Vitals{
		SpO2Pct: st.SpO2Pct, PulseBPM: st.PulseBPM, PIPct: st.PIPct,
		RespRateBPM: st.RespRateBPM, RespWanderPct: 1, MotionPct: 4 * st.Motion,
		SensorOff: st.SensorOff,
	}
}

func (d *device) generate(st *scenario.State) {
	c := d.newChunk()
	f := d.f
	corrupt := f.opts.CorruptRate > 0 && d.rng.Float64() < f.opts.CorruptRate
	if d.mode == ModeRaw {
		n := f.chunk
		d.src.Fill(d.fr, d.fi, nil, Vitals(st))
		r := &c.raw
		r.Red, r.Ir = r.Red[:n], r.Ir[:n]
		for i := 0; i < n; i++ {
			r.Red[i], r.Ir[i] = uint32(d.fr[i]), uint32(d.fi[i])
		}
		r.DeviceTimeUnixMs = d.deviceMs(d.k)
		r.SampleRateHz = f.rate
		r.LedDriveMa, r.Gain = 20, 1
		c.samples = n
		if corrupt {
			switch d.rng.IntN(3) {
			case 0: // a code beyond the converter's range
				r.Red[d.rng.IntN(n)] = 1<<ADCBits + uint32(d.rng.IntN(1000))
			case 1: // channels of different lengths
				if n > 1 {
					r.Ir = r.Ir[:n-1]
				} else {
					r.Ir = r.Ir[:0]
				}
			default: // an absurd sample rate
				r.SampleRateHz = 1e6
			}
		}
	} else {
		s := &c.sum
		s.DeviceTimeUnixMs = d.deviceMs(d.k + 1)
		s.Spo2Pct, s.PulseBpm, s.PiPct, s.Quality = nil, nil, nil, nil
		c.samples = 1
		if !st.SensorOff {
			q := math.Max(0, 0.95-0.6*st.Motion)
			c.vals[3] = math.Round(q*100) / 100
			s.Quality = &c.vals[3]
			if st.Motion < 0.5 {
				c.vals[0] = math.Min(100, math.Round(st.SpO2Pct+0.4*d.rng.NormFloat64()))
				c.vals[1] = math.Round(st.PulseBPM + d.rng.NormFloat64())
				c.vals[2] = math.Round(st.PIPct*100) / 100
				s.Spo2Pct, s.PulseBpm, s.PiPct = &c.vals[0], &c.vals[1], &c.vals[2]
			}
		}
		if corrupt {
			switch d.rng.IntN(3) {
			case 0:
				c.vals[0] = 100 + 1 + float64(d.rng.IntN(100))
				s.Spo2Pct = &c.vals[0]
			case 1:
				c.vals[1] = 400 + float64(d.rng.IntN(1000))
				s.PulseBpm = &c.vals[1]
			default:
				c.vals[3] = 2 + d.rng.Float64()
				s.Quality = &c.vals[3]
			}
		}
	}
	c.corrupt = corrupt
	d.mu.Lock()
	c.setSeq(d.nextSeq)
	d.nextSeq++
	d.buf = append(d.buf, c)
	f.c.outstanding.Add(1)
	if len(d.buf)-d.head > f.maxBuf {
		old := d.buf[d.head]
		d.popFront()
		if !old.done {
			f.c.overflow.Add(1)
		}
	}
	d.mu.Unlock()
}

// unacked counts buffered messages still awaiting the gateway; mu held.
func (d *device) unacked() int {
	n := 0
	for _, c := range d.buf[d.head:] {
		if !c.done {
			n++
		}
	}
	return n
}

// popFront removes the oldest buffered message; mu held.
func (d *device) popFront() {
	c := d.buf[d.head]
	d.buf[d.head] = nil
	d.head++
	if d.head == len(d.buf) {
		d.buf, d.head = d.buf[:0], 0
	} else if d.head > 64 && d.head*2 > len(d.buf) {
		n := copy(d.buf, d.buf[d.head:])
		clear(d.buf[n:])
		d.buf, d.head = d.buf[:n], 0
	}
	d.f.c.outstanding.Add(-1)
	if c.sending {
		c.recycle = true
		return
	}
	d.release(c)
}

// maxFree bounds the recycled chunks a device keeps; after a long outage
// the rest of its backlog's buffers go to the garbage collector.
const maxFree = 8

// release keeps c for reuse; mu held.
func (d *device) release(c *chunk) {
	if len(d.free) < maxFree {
		d.free = append(d.free, c)
	}
}

// find returns the buffered message with sequence seq, or nil; mu held.
func (d *device) find(seq uint64) *chunk {
	if d.head == len(d.buf) {
		return nil
	}
	first := d.buf[d.head].seq
	if seq < first || seq-first >= uint64(len(d.buf)-d.head) {
		return nil
	}
	return d.buf[d.head+int(seq-first)]
}

// acked counts a message the gateway holds; mu held.
func (d *device) acked(c *chunk, now time.Duration, latency bool) {
	f := d.f
	switch {
	case c.done:
	case c.corrupt:
		f.c.corruptAcked.Add(1)
	default:
		f.c.framesAcked.Add(1)
		f.c.samplesAcked.Add(uint64(c.samples))
		d.framesAcked++
		d.samplesAcked += uint64(c.samples)
		if latency && c.sentAt > 0 {
			f.hist.Record(now - c.sentAt)
		}
	}
	c.done = true
}

// flush sends buffered messages the current stream has not carried yet, in
// order. With block false it gives up at once if another goroutine sends.
func (d *device) flush(block bool) {
	if block {
		d.sendMu.Lock()
	} else if !d.sendMu.TryLock() {
		return
	}
	defer d.sendMu.Unlock()
	f := d.f
	for {
		d.mu.Lock()
		s := d.stream
		var c *chunk
		if s != nil && d.head < len(d.buf) && f.since() >= d.holdUntil {
			first := d.buf[d.head].seq
			i := d.head
			if d.sentThrough >= first {
				i += int(d.sentThrough - first + 1)
			}
			for ; i < len(d.buf) && d.buf[i].done; i++ {
			}
			if i < len(d.buf) {
				c = d.buf[i]
			}
		}
		if c == nil {
			d.mu.Unlock()
			return
		}
		first := c.sentAt == 0
		if first {
			c.sentAt = f.since()
			// Counted when first handed to a stream, before Send: a send
			// that fails may still have reached the gateway, and a message
			// whose first send failed is acknowledged after a resend; an
			// acknowledgement can also arrive before Send returns. Counting
			// after a successful Send left frames_sent below frames_acked.
			f.c.framesSent.Add(1)
			f.c.samplesSent.Add(uint64(c.samples))
			if c.corrupt {
				f.c.corruptSent.Add(1)
			}
		}
		d.sentThrough = c.seq
		c.sending = true
		d.mu.Unlock()

		err := s.Send(&c.req)

		d.mu.Lock()
		c.sending = false
		if c.recycle {
			c.recycle = false
			d.release(c)
		}
		d.mu.Unlock()
		if err != nil {
			d.breakStream(s, false)
			return
		}
		if !first {
			f.c.resent.Add(1)
		}
	}
}

func (d *device) sendStatus(st *scenario.State, ts float64) {
	if !d.sendMu.TryLock() {
		return
	}
	defer d.sendMu.Unlock()
	d.mu.Lock()
	s := d.stream
	d.mu.Unlock()
	if s == nil {
		return
	}
	b := d.battery
	d.statusV.DeviceTimeUnixMs = d.f.startMs + int64(ts*(1+d.drift)*1000)
	d.statusV.BatteryPct = math.Round(st.BatteryPct*10) / 10
	d.statusV.TemperatureC = firstNonZero(b.TemperatureC, 33)
	d.statusV.LinkQuality = firstNonZero(b.LinkQuality, 0.9)
	if err := s.Send(d.status); err != nil {
		d.breakStream(s, false)
		return
	}
	d.f.c.statuses.Add(1)
}
