package ingest

import (
	"math"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Device time policy (the rule and its reasons are in doc.go, "Device
// time"). Alarm evaluation runs on device time; the gateway admits a data
// message's device time only when it cannot freeze evaluation or rewrite
// history, and raises the technical condition device_clock_fault whenever it
// refuses or distrusts a device's clock.
const (
	// ClockAheadMax is how far a device time may be ahead of the gateway
	// clock. Beyond it the message is refused (INVALID_FIELD naming
	// *.device_time_unix_ms and the bound): a time ahead of now would hold
	// back every later message of a correct clock for as long (team choice:
	// well above the error of a device clock set from Welcome's gateway
	// time, well below the 10 s delay of device_clock_fault and the 15 s
	// spo2_low delay of adult-ward-pilot).
	ClockAheadMax = 5 * time.Second
	// clockLagMax is how far a session's messages may fall behind the
	// least-behind message of the same session (device minus gateway time)
	// before the clock is distrusted: a clock that runs slow or stands
	// still would stretch every alarm delay. Such messages are still
	// stored and evaluated (team choice: a minute of lag; a resent backlog
	// comes first in a session and never counts).
	clockLagMax = 60 * time.Second
	// clockTrustLag: once device_clock_fault is present, an accepted message
	// clears it only when it lags the session's least-behind message by at
	// most this (team choice: twice ClockAheadMax), so a clock that is stuck
	// or slow and only now and then accepted cannot keep restarting the
	// fault's delay.
	clockTrustLag = 2 * ClockAheadMax
	// clockClearAfter: device_clock_fault clears only after accepted
	// messages within clockTrustLag for this long without a refusal (team
	// choice: half the 10 s delay of device_clock_fault, so a glitch of a
	// few seconds is withdrawn before it is announced, and a clock accepted
	// only now and then cannot keep restarting the fault's delay).
	clockClearAfter = ClockAheadMax
)

// seqTime is an accepted data message not yet known durable.
type seqTime struct {
	seq   uint64
	devMS int64
}

// deviceClock is the gateway's view of one device's clock. Guarded by the
// device's mutex.
type deviceClock struct {
	durableMS int64     // device time of the newest durable data message (0 = none)
	pending   []seqTime // accepted but not yet durable, ascending
	maxOffMS  int64     // session: largest (device end - gateway) time of an accepted message
	sessOK    bool      // maxOffMS is set
	fault     bool      // the clock is refused or distrusted (device_clock_fault present)
	trustMS   int64     // while fault: gateway time since which every message was accepted within clockTrustLag (0 = none)
	techS     float64   // the last time given to the engine's gateway-timed conditions (techNowS)
	techMS    int64     // the gateway time it was given at (0 = never)
}

// admitTime applies the device time policy to a data message with device
// time devMS covering spanMS (raw chunks; 0 for a summary), received at
// gateway time nowMS, after its sequence number was found new. It returns
// the rejection when the message is refused (nothing of it may be stored or
// evaluated), else records the message as accepted (its sequence and device
// time in the cursor), accounts clock quality and
// reports whether the message is late. Either way it sets or clears the
// device_clock_fault condition, calling emit with the engine's events.
// Caller holds d.mu.
func (d *device) admitTime(seq uint64, field string, devMS int64, samples uint32, spanMS, nowMS int64, lateAfter time.Duration, emit func(alarms.Event)) (*pb.Rejection, bool) {
	var rej *pb.Rejection
	last := d.lastAcceptedMS()
	switch ahead := devMS - nowMS; {
	case devMS <= 0 || devMS < nowMS-maxClockSkew:
		rej = invalid(seq, field, "%d, want after %d (at most one year before the gateway clock)", devMS, nowMS-maxClockSkew)
	case ahead > ClockAheadMax.Milliseconds():
		rej = invalid(seq, field, "%d is %v ahead of the gateway clock (%d), want at most %v ahead (%d); set the device clock from Welcome.gateway_time_unix_ms",
			devMS, time.Duration(ahead)*time.Millisecond, nowMS, ClockAheadMax, nowMS+ClockAheadMax.Milliseconds())
	case last != 0 && devMS <= last:
		rej = reject(seq, pb.RejectReason_REJECT_REASON_STALE_DEVICE_TIME, field,
			"%d is not after %d, the device time of the last accepted message; the first values stored at a device time are kept, never rewritten", devMS, last)
	}
	if rej != nil {
		d.clock.trustMS = 0 // a refusal ends any trust being rebuilt
		d.setClockFault(true, nowMS, emit)
		return rej, false
	}
	d.cur.LastSeq, d.cur.LastDeviceMS = seq, devMS
	// A resend after a rewind supersedes what was pending from this number on.
	n := len(d.clock.pending)
	for n > 0 && d.clock.pending[n-1].seq >= seq {
		n--
	}
	d.clock.pending = append(d.clock.pending[:n], seqTime{seq, devMS})
	late := d.q.addChunk(nowMS, devMS, samples, lateAfter)
	off := devMS + spanMS - nowMS
	if !d.clock.sessOK || off > d.clock.maxOffMS {
		d.clock.maxOffMS, d.clock.sessOK = off, true
	}
	lag := d.clock.maxOffMS - off
	fault := lag > clockLagMax.Milliseconds()
	if d.clock.fault && !fault {
		// Trusted again only after clockClearAfter within clockTrustLag.
		switch {
		case lag > clockTrustLag.Milliseconds():
			d.clock.trustMS = 0
		case d.clock.trustMS == 0:
			d.clock.trustMS = nowMS
		}
		fault = d.clock.trustMS == 0 || nowMS-d.clock.trustMS < clockClearAfter.Milliseconds()
	}
	d.setClockFault(fault, nowMS, emit)
	return nil, late
}

// lastAcceptedMS is the device time of the last accepted data message: the
// newest durable one's when nothing after it is accepted (after a rewind to
// the durable point, however the rewind was made). Caller holds d.mu.
func (d *device) lastAcceptedMS() int64 {
	if d.cur.LastSeq <= d.durableSeq {
		return d.clock.durableMS
	}
	return d.cur.LastDeviceMS
}

// setClockFault reports the device's clock refused or distrusted (fault) or
// trusted at gateway time nowMS to its alarm engine. Caller holds d.mu.
func (d *device) setClockFault(fault bool, nowMS int64, emit func(alarms.Event)) {
	if !fault || !d.clock.fault {
		d.clock.trustMS = 0 // cleared, or a new fault: trust starts afresh
	}
	d.clock.fault = fault
	if d.engine == nil || (!fault && !d.engine.ClockFault()) {
		return
	}
	d.engine.SetClockFault(fault, d.techNowS(nowMS), emit)
}

// techNowS is the time for the conditions the gateway times itself
// (device_clock_fault, device_offline, signal_lost between samples): gateway
// time nowMS on the engine's clock (engineNowS), but never before the last
// such time plus the gateway time passed since, so it never runs backwards
// when the device clock's estimated offset moves back, and a fault's delay
// always elapses in gateway time. Caller holds d.mu.
func (d *device) techNowS(nowMS int64) float64 {
	t := d.engineNowS(nowMS)
	if d.clock.techMS != 0 {
		t = math.Max(t, d.clock.techS+float64(max(nowMS-d.clock.techMS, 0))/1000)
	}
	d.clock.techS, d.clock.techMS = t, nowMS
	return t
}

// engineNowS is gateway time nowMS on the alarm engine's clock (device
// time), never before the last evaluated sample. Caller holds d.mu.
func (d *device) engineNowS(nowMS int64) float64 {
	t := d.deviceTimeS(nowMS)
	if d.engine != nil {
		t = math.Max(t, d.engine.LastT())
	}
	return t
}

// evalPoint feeds one trend point to the device's alarm engine. Caller holds d.mu.
func (d *device) evalPoint(p *store.Point, emit func(alarms.Event)) {
	if d.engine != nil {
		d.engine.Eval(alarms.Sample{T: float64(p.TimeMS) / 1000, SpO2: p.SpO2, Pulse: p.Pulse, PI: p.PI, SQI: p.SQI}, emit)
	}
}

// rewindToDurable forgets what was accepted but is not durable (a new
// stream starts, or a batch failed): the device resends it from its durable
// point, and its device times are accepted again. A new session of
// lag measurement starts. Caller holds d.mu.
func (d *device) rewindToDurable() {
	d.cur.LastSeq = d.durableSeq
	d.cur.LastDeviceMS = d.clock.durableMS
	d.clock.pending = d.clock.pending[:0]
	d.clock.sessOK = false
}

// restoreClock bounds what a store holds about a device's clock and alarm
// engine by the gateway clock at start-up: a device time or an engine clock
// ahead of nowMS by more than ClockAheadMax (written before device times
// were bounded, or the gateway clock was set back) would refuse or ignore
// every later message of a correct clock. It reports whether it changed the
// engine. Caller holds d.mu (or owns d alone).
func (d *device) restoreClock(nowMS int64) bool {
	bound := nowMS + ClockAheadMax.Milliseconds()
	if d.cur.LastDeviceMS > bound {
		d.cur.LastDeviceMS = nowMS
	}
	d.clock.durableMS = d.cur.LastDeviceMS
	return d.engine != nil && d.engine.LastT() > float64(bound)/1000 && d.engine.Rewind(float64(nowMS)/1000, nil)
}
