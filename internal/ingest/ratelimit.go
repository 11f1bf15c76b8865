package ingest

import (
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// tokenBucket limits a device stream's message rate. Time is the gateway
// clock in milliseconds, passed in. The zero value is not usable: set rate
// and burst (init does) before the first allow.
type tokenBucket struct {
	rate   float64 // tokens per millisecond
	burst  float64
	tokens float64
	lastMS int64
	// holdFrom is the lowest data sequence refused over the limit and not
	// yet accepted (0 = none), last refused at holdMS; the hold ends
	// RateHoldMS after that (a device that gave that message up is not
	// blocked for ever).
	holdFrom uint64
	holdMS   int64
}

// RateHoldMS is how long later messages wait for a refused one's resend.
const RateHoldMS = 10_000

func (b *tokenBucket) init(perSecond float64, burst int, nowMS int64) {
	b.rate, b.burst, b.tokens, b.lastMS = perSecond/1000, float64(burst), float64(burst), nowMS
}

// refill adds the tokens due since the last call.
func (b *tokenBucket) refill(nowMS int64) {
	if dt := nowMS - b.lastMS; dt > 0 {
		b.tokens = min(b.burst, b.tokens+float64(dt)*b.rate)
		b.lastMS = nowMS
	}
}

// allow takes one token if there is one.
func (b *tokenBucket) allow(nowMS int64) bool { return b.allowN(nowMS, 1) }

// allowN takes n tokens if there are that many.
func (b *tokenBucket) allowN(nowMS int64, n float64) bool {
	b.refill(nowMS)
	if b.tokens >= n {
		b.tokens -= n
		return true
	}
	return false
}

// deviceSpanS is the device time a message covers, in seconds: 1 for a
// summary, samples over rate for a raw chunk (0 when its rate is invalid:
// validation rejects it), 0 for anything else.
func deviceSpanS(m *pb.ConnectRequest) float64 {
	switch k := m.Kind.(type) {
	case *pb.ConnectRequest_Summary:
		return 1
	case *pb.ConnectRequest_RawChunk:
		if r := k.RawChunk.GetSampleRateHz(); r >= minRateHz && r <= maxRateHz {
			return float64(len(k.RawChunk.GetRed())) / r
		}
	}
	return 0
}

// rateLimited applies the stream's message-rate limit to m: over it, m is
// rejected with REJECT_REASON_RATE_LIMITED (the device slows down and
// resends from that sequence) and the stream goes on. Until the device does
// resend from there (or RateHoldMS passes), later data messages are rejected
// the same way, so a message that arrives after a refill cannot be accepted
// past the rejected one (which would then count as lost and its resend as
// stale).
func (s *stream) rateLimited(m *pb.ConnectRequest, nowMS int64) bool {
	if s.bucket.burst == 0 {
		lim := s.p.cfg.Limits()
		s.bucket.init(lim.Messages, lim.Burst, nowMS)
		s.span.rate, s.span.burst, s.span.tokens, s.span.lastMS = lim.DeviceTime/1000, lim.DeviceTimeBurst.Seconds(), lim.DeviceTimeBurst.Seconds(), nowMS
	}
	seq := seqOf(m)
	if s.bucket.holdFrom != 0 && nowMS-s.bucket.holdMS > RateHoldMS {
		s.bucket.holdFrom = 0
	}
	if h := s.bucket.holdFrom; h != 0 && seq > h {
		s.countReject()
		s.rejectMsg(reject(seq, pb.RejectReason_REJECT_REASON_RATE_LIMITED, "sequence",
			"rate limited: resend from sequence %d first (it was refused over the limit)", h))
		return true
	}
	span := deviceSpanS(m)
	s.bucket.refill(nowMS)
	s.span.refill(nowMS)
	msgOK, spanOK := s.bucket.tokens >= 1, s.span.tokens >= span
	if msgOK && spanOK {
		s.bucket.tokens--
		s.span.tokens -= span
		if seq != 0 && seq <= s.bucket.holdFrom {
			s.bucket.holdFrom = 0 // the device resent from the refused message
		}
		return false
	}
	if seq != 0 && (s.bucket.holdFrom == 0 || seq <= s.bucket.holdFrom) {
		// Refused again from the held message: the device is still
		// resending it, so the hold runs from now. (Timed from the first
		// refusal, it could end right after a refused resend, and the next
		// message would be accepted past the one refused, which the
		// acknowledgement through it would then cover.)
		s.bucket.holdFrom, s.bucket.holdMS = seq, nowMS
	}
	s.countReject()
	if !msgOK {
		s.rejectMsg(reject(seq, pb.RejectReason_REJECT_REASON_RATE_LIMITED, "message",
			"more than %g messages/s (burst %g) on this stream; slow down and resend from sequence %d", s.bucket.rate*1000, s.bucket.burst, seq))
	} else {
		s.rejectMsg(reject(seq, pb.RejectReason_REJECT_REASON_RATE_LIMITED, "device_time",
			"more than %g s of device time per second (burst %g s) on this stream; slow down and resend from sequence %d",
			s.span.rate*1000, s.span.burst, seq))
	}
	return true
}
