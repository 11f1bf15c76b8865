package gateway

import (
	"sync/atomic"

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
	// yet resent (0 = none), since holdMS; the hold ends after rateHoldMS
	// (a device that gave that message up is not blocked for ever).
	holdFrom uint64
	holdMS   int64
}

// rateHoldMS is how long later messages wait for a refused one's resend.
const rateHoldMS = 10_000

func (b *tokenBucket) init(perSecond float64, burst int, nowMS int64) {
	b.rate, b.burst, b.tokens, b.lastMS = perSecond/1000, float64(burst), float64(burst), nowMS
}

// allow takes one token if there is one.
func (b *tokenBucket) allow(nowMS int64) bool {
	if dt := nowMS - b.lastMS; dt > 0 {
		b.tokens = min(b.burst, b.tokens+float64(dt)*b.rate)
		b.lastMS = nowMS
	}
	if b.tokens >= 1 {
		b.tokens--
		return true
	}
	return false
}

// rateLimited applies the stream's message-rate limit to m: over it, m is
// rejected with REJECT_REASON_RATE_LIMITED (the device slows down and
// resends from that sequence) and the stream goes on. Until the device does
// resend from there (or rateHoldMS passes), later data messages are rejected
// the same way, so a message that arrives after a refill cannot be accepted
// past the rejected one (which would then count as lost and its resend as
// stale).
func (s *stream) rateLimited(m *pb.ConnectRequest, nowMS int64) bool {
	if s.bucket.burst == 0 {
		sec := s.g.security()
		s.bucket.init(sec.DeviceRate, sec.DeviceBurst, nowMS)
	}
	seq := seqOf(m)
	if s.bucket.holdFrom != 0 && nowMS-s.bucket.holdMS > rateHoldMS {
		s.bucket.holdFrom = 0
	}
	if h := s.bucket.holdFrom; h != 0 && seq > h {
		s.countReject()
		s.rejectMsg(reject(seq, pb.RejectReason_REJECT_REASON_RATE_LIMITED, "sequence",
			"rate limited: resend from sequence %d first (it was refused over the limit)", h))
		return true
	}
	if s.bucket.allow(nowMS) {
		if seq != 0 && seq <= s.bucket.holdFrom {
			s.bucket.holdFrom = 0 // the device resent from the refused message
		}
		return false
	}
	if seq != 0 && (s.bucket.holdFrom == 0 || seq < s.bucket.holdFrom) {
		s.bucket.holdFrom, s.bucket.holdMS = seq, nowMS
	}
	s.countReject()
	s.rejectMsg(reject(seq, pb.RejectReason_REJECT_REASON_RATE_LIMITED, "message",
		"more than %g messages/s (burst %g) on this stream; slow down and resend from sequence %d", s.bucket.rate*1000, s.bucket.burst, seq))
	return true
}

// handleHook, when set, is called with every message a stream handles
// (tests inject faults with it, such as a panic).
var handleHook atomic.Pointer[func(*pb.ConnectRequest)]

func callHandleHook(m *pb.ConnectRequest) {
	if h := handleHook.Load(); h != nil {
		(*h)(m)
	}
}
