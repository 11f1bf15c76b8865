package ingest

import (
	"context"
	"fmt"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The two goroutines a stream owns beside its handler: the reader owns
// gRPC's Recv, the sender owns Send, so the handler never blocks on its
// device.
// ackThrough records that everything up to seq is durable and wakes the sender.
func (s *stream) ackThrough(seq uint64) {
	for {
		old := s.acked.Load()
		if seq <= old || s.acked.CompareAndSwap(old, seq) {
			break
		}
	}
	select {
	case s.wake <- struct{}{}:
	default:
	}
}

// send queues a message for the device and wakes the sender. When
// sendQueue messages already wait (the device reads its answers more slowly
// than it sends), the handler waits until the sender has taken them: every
// message is answered, none is dropped, and a device that does not read is
// not read from either (its transport's flow control holds it back) until
// it reads again, is replaced, or is cut off after Config.SendStall. The
// wait ends at once when the stream is cancelled.
func (s *stream) send(m *pb.ConnectResponse) {
	for {
		s.outMu.Lock()
		if len(s.outq) < sendQueue {
			s.outq = append(s.outq, m)
			s.outMu.Unlock()
			select {
			case s.wake <- struct{}{}:
			default:
			}
			return
		}
		s.waits++
		s.outMu.Unlock()
		select {
		case <-s.room:
		case <-s.ctx.Done():
			return // the stream ends: nobody will read the answer
		}
	}
}

// sender owns gRPC's Send: it sends queued messages, then an ack when the
// durable sequence has advanced since the last one. It stops after one
// last round once the handler closes s.closing, or when a Send fails (the
// stream is then cancelled). A Send blocked by a device that does not read
// returns when the RPC ends: the handler does not wait for it longer than
// senderDrain, and the watchdog ends such a stream after sendStall.
func (s *stream) sender() {
	defer close(s.senderDone)
	var (
		batch   []*pb.ConnectResponse
		sentAck uint64
	)
	for {
		last := false
		select {
		case <-s.wake:
		case <-s.closing:
			last = true
		}
		s.outMu.Lock()
		batch = append(batch[:0], s.outq...)
		clear(s.outq)
		s.outq = s.outq[:0]
		s.outMu.Unlock()
		select { // a handler waiting for room may queue again
		case s.room <- struct{}{}:
		default:
		}
		for i, m := range batch {
			if err := s.sendOne(m); err != nil {
				s.cancel(fmt.Errorf("send to device: %w", err))
				return
			}
			batch[i] = nil
		}
		if a := s.acked.Load(); a > sentAck {
			sentAck = a
			if err := s.sendOne(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Ack{Ack: &pb.Ack{ThroughSequence: a}}}); err != nil {
				s.cancel(fmt.Errorf("send to device: %w", err))
				return
			}
		}
		if last {
			return
		}
	}
}

func (s *stream) sendOne(m *pb.ConnectResponse) error {
	s.sendingSince.Store(time.Now().UnixMilli())
	err := s.conn.Send(m)
	s.sendingSince.Store(0)
	return err
}

// blockedFor is how long the Send in progress has been blocked (0 when
// none). Wall clock: it measures the transport, not the gateway's injected
// clock.
func (s *stream) blockedFor() time.Duration {
	t := s.sendingSince.Load()
	if t == 0 {
		return 0
	}
	return time.Duration(time.Now().UnixMilli()-t) * time.Millisecond
}

// checkStall ends the stream when one Send has been blocked for longer than
// Config.SendStall (Tick calls it).
func (s *stream) checkStall() {
	if s.blockedFor() > s.p.cfg.SendStall {
		if context.Cause(s.ctx) == nil {
			s.p.m.sendStalls.Inc()
		}
		s.cancel(ErrSendStalled)
	}
}

// SendBlocked is how long the Send in progress on the device's open stream
// has been blocked by a device that does not read (0 when none, or no
// stream): the figure Tick ends a stream on.
func (p *Pipeline) SendBlocked(deviceID string) time.Duration {
	d := p.devices.get(deviceID)
	if d == nil {
		return 0
	}
	if s := d.streamNow(); s != nil {
		return s.blockedFor()
	}
	return 0
}

// drainSender lets the sender deliver what is due, for at most senderDrain.
func (s *stream) drainSender() {
	close(s.closing)
	t := time.NewTimer(senderDrain)
	defer t.Stop()
	select {
	case <-s.senderDone:
	case <-t.C:
	}
}

func (s *stream) rejectMsg(r *pb.Rejection) {
	s.p.m.rejected.WithLabelValues(reasonLabel(r.Reason)).Inc()
	s.send(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Rejection{Rejection: r}})
}

func reasonLabel(r pb.RejectReason) string {
	switch r {
	case pb.RejectReason_REJECT_REASON_INVALID_FIELD:
		return "invalid_field"
	case pb.RejectReason_REJECT_REASON_NOT_INTRODUCED:
		return "not_introduced"
	case pb.RejectReason_REJECT_REASON_STALE_SEQUENCE:
		return "stale_sequence"
	case pb.RejectReason_REJECT_REASON_TOO_LARGE:
		return "too_large"
	case pb.RejectReason_REJECT_REASON_RATE_LIMITED:
		return "rate_limited"
	case pb.RejectReason_REJECT_REASON_WRONG_MODE:
		return "wrong_mode"
	case pb.RejectReason_REJECT_REASON_STALE_DEVICE_TIME:
		return "stale_device_time"
	}
	return "other"
}

// recv returns the next message from the device, or the stream's end: the
// transport's error, or the cause when the stream is cancelled (replaced by
// a newer stream, store failure, gateway shutting down).
func (s *stream) recv(ctx context.Context) (*pb.ConnectRequest, error) {
	select {
	case m := <-s.msgs:
		return m, nil
	case err := <-s.recvErr:
		return nil, err
	case <-ctx.Done():
		return nil, context.Cause(ctx)
	}
}

// reader owns gRPC's Recv for the RPC's lifetime: it hands each message over
// and stops at the first error. It ends with the RPC (when the handler has
// returned, gRPC cancels the stream and Recv fails).
func (s *stream) reader(ctx context.Context) {
	for {
		m, err := s.conn.Recv()
		if err != nil {
			s.recvErr <- err // buffered: never blocks
			return
		}
		select {
		case s.msgs <- m:
		case <-ctx.Done():
			return
		}
	}
}
