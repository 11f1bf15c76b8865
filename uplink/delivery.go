package uplink

// Delivery of held messages over one stream: the Welcome that sets the resume
// point, the sender that sends in order and resends on silence, and the
// answers (Ack, Rejection) that settle what the client holds.

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/protobuf/proto"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// stream runs one stream until it ends; welcomed says whether the gateway
// accepted the introduction.
func (c *Client) stream(ctx context.Context, conn *grpc.ClientConn, addr string) (welcomed bool, err error) {
	sctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st, w, err := Open(sctx, conn, c.opts.Token, c.intro)
	if err != nil {
		return false, err
	}
	if err := c.welcome(w.GetResumeAfterSequence()); err != nil {
		return true, err
	}
	c.opts.Logf("gateway %s: welcomed; it holds through message %d", addr, w.GetResumeAfterSequence())
	c.mu.Lock()
	c.st.Connected = true
	c.mu.Unlock()
	defer func() {
		c.mu.Lock()
		c.st.Connected = false
		c.mu.Unlock()
	}()
	sendErr := make(chan error, 1)
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		sendErr <- c.sender(sctx, st)
	}()
	defer wg.Wait()
	defer cancel()
	recvErr := make(chan error, 1)
	wg.Add(1)
	go func() { // Recv ends when sctx is cancelled
		defer wg.Done()
		for {
			m, err := st.Recv()
			if err != nil {
				recvErr <- err
				return
			}
			switch k := m.Kind.(type) {
			case *pb.ConnectResponse_Ack:
				c.onAck(k.Ack.GetThroughSequence())
			case *pb.ConnectResponse_Rejection:
				c.onReject(k.Rejection)
			case *pb.ConnectResponse_Redirect:
				recvErr <- &RedirectError{Address: k.Redirect.GetAddress(), Detail: k.Redirect.GetDetail()}
				return
			}
		}
	}()
	select {
	case err = <-recvErr:
	case err = <-sendErr:
		if err == nil {
			err = ctx.Err()
		}
	}
	cancel()
	if err != nil && errors.Is(err, io.EOF) {
		err = errors.New("gateway closed the stream")
	}
	return true, err
}

// welcome applies the gateway's resume point.
func (c *Client) welcome(resume uint64) error {
	c.mu.Lock()
	defer c.mu.Unlock()
	held := c.items[c.head:]
	renumber := false
	switch {
	case !c.welcomed && resume > 0:
		// First meeting with a gateway that knows this device id from an
		// earlier life: nothing was sent before, so renumbering is safe.
		renumber = true
	case c.welcomed && resume >= c.nextSeq:
		// The gateway holds more than this client ever numbered: another
		// client used the id meanwhile. Follow its numbering.
		renumber = true
		c.opts.Logf("gateway holds device messages through %d, beyond the %d this client numbered: renumbering what it holds", resume, c.nextSeq-1)
	}
	if renumber {
		c.st.Renumbered++
		if len(held) > 0 && c.sp != nil {
			if err := c.sp.renumbered(held[0].seq, resume+1); err != nil {
				c.failed = err
				return err
			}
		}
		for i, it := range held {
			it.seq = resume + 1 + uint64(i)
			it.sent = false
		}
		c.nextSeq = resume + 1 + uint64(len(held))
		c.finished = resume
	}
	if resume < c.finished {
		c.st.ResumeRegress++
		c.opts.Logf("gateway resumes after message %d, below the %d it acknowledged before: messages %d..%d are gone from its store, or (a fleet on etcd) held by the gateway that acknowledged them", resume, c.finished, resume+1, c.finished)
	}
	if !c.welcomed {
		c.welcomed = true
		if c.sp != nil {
			if err := c.sp.append('W'); err != nil {
				c.failed = err
				return err
			}
		}
	}
	c.ackLocked(resume)
	c.sentThrough = resume
	if c.head < len(c.items) && c.items[c.head].seq > resume+1 {
		c.sentThrough = c.items[c.head].seq - 1
	}
	return nil
}

// answerTimeout is how long the sender waits for any answer (an
// acknowledgement or a rejection) to messages it has sent before it resends
// them: a safety net, since the gateway answers every message.
const answerTimeout = 5 * time.Second

// sender sends held messages the stream has not carried, in order.
func (c *Client) sender(ctx context.Context, st pb.IngestService_ConnectClient) error {
	timer := time.NewTimer(time.Hour)
	defer timer.Stop()
	c.mu.Lock()
	lastFinished, lastProgress := c.finished, time.Now()
	c.mu.Unlock()
	for {
		c.mu.Lock()
		var it *item
		wait := time.Until(c.holdUntil)
		if c.finished != lastFinished {
			lastFinished, lastProgress = c.finished, time.Now()
		}
		if wait <= 0 {
			for i := c.head; i < len(c.items); i++ {
				if x := c.items[i]; x.seq > c.sentThrough && !x.done {
					it = x
					break
				}
			}
			// Everything is sent but some of it is unanswered: an answer
			// that never comes must not leave the device waiting forever.
			// After answerTimeout without progress, resend from the first
			// unanswered message (the gateway answers what it already holds
			// as stale and never stores it twice).
			if it == nil && c.head < len(c.items) && c.sentThrough > c.finished {
				since := time.Since(lastProgress)
				if since >= answerTimeout {
					c.opts.Logf("no answer for %v to messages %d..%d: resending them", since.Round(time.Second), c.finished+1, c.sentThrough)
					c.sentThrough = c.finished
					lastProgress = time.Now()
					c.mu.Unlock()
					continue
				}
				wait = answerTimeout - since
			}
		}
		var m *pb.ConnectRequest
		var err error
		if it != nil {
			m, err = c.load(it)
			if err == nil {
				c.sentThrough = it.seq
				if it.sent {
					c.st.Resent++
				} else {
					it.sent = true
					c.st.SamplesSent += uint64(it.samples)
				}
			}
		}
		c.mu.Unlock()
		if err != nil {
			return err
		}
		if it == nil {
			if wait <= 0 {
				wait = time.Hour
			}
			timer.Reset(wait)
			select {
			case <-ctx.Done():
				return nil
			case <-c.kick:
			case <-timer.C:
			}
			continue
		}
		if err := st.Send(m); err != nil {
			return recvError(st, err)
		}
	}
}

// load returns the message of it, read from the spool when needed; mu held.
func (c *Client) load(it *item) (*pb.ConnectRequest, error) {
	m := it.msg
	if m == nil {
		b, err := c.sp.read(it)
		if err != nil {
			return nil, err
		}
		m = &pb.ConnectRequest{}
		if err := proto.Unmarshal(b, m); err != nil {
			return nil, fmt.Errorf("spool: message %d: %w", it.seq, err)
		}
	}
	setSeq(m, it.seq)
	return m, nil
}

func (c *Client) onAck(through uint64) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.ackLocked(through)
	c.holdOff = 0
}

// ackLocked takes every held message up to through as durable; mu held.
func (c *Client) ackLocked(through uint64) {
	if through <= c.finished && (c.head == len(c.items) || c.items[c.head].seq > through) {
		return
	}
	for c.head < len(c.items) && c.items[c.head].seq <= through {
		it := c.items[c.head]
		if !it.done {
			c.st.SamplesAcked += uint64(it.samples)
		}
		c.pop()
	}
	c.finished = max(c.finished, through)
	c.settle()
}

// pop drops the oldest held message; mu held.
func (c *Client) pop() {
	it := c.items[c.head]
	c.items[c.head] = nil
	c.head++
	c.st.HeldMessages--
	c.st.HeldBytes -= int64(it.size)
	c.st.HeldSamples -= int64(it.samples)
	if c.head == len(c.items) {
		c.items, c.head = c.items[:0], 0
	} else if c.head > 1024 && c.head*2 > len(c.items) {
		n := copy(c.items, c.items[c.head:])
		clear(c.items[n:])
		c.items, c.head = c.items[:n], 0
	}
}

// settle records progress in the spool, compacts it when the finished part
// dominates, and wakes waiters; mu held.
func (c *Client) settle() {
	if c.sp != nil && c.failed == nil {
		err := c.sp.finished(c.finished)
		slack := max(8<<20, c.opts.MaxBytes/4)
		if err == nil && c.sp.size > c.st.HeldBytes+slack {
			err = c.sp.rewrite(c.meta, c.welcomed, c.finished, c.lastMark, c.items[c.head:])
		}
		if err != nil {
			c.failed = err
			c.opts.Logf("%v", err)
		}
	}
	c.notify()
}

// find returns the held message with sequence seq, or nil; mu held.
func (c *Client) find(seq uint64) *item {
	if c.head == len(c.items) {
		return nil
	}
	first := c.items[c.head].seq
	if seq < first || seq-first >= uint64(len(c.items)-c.head) {
		return nil
	}
	return c.items[c.head+int(seq-first)]
}

func (c *Client) onReject(r *pb.Rejection) {
	c.mu.Lock()
	defer c.mu.Unlock()
	it := c.find(r.GetSequence())
	switch r.GetReason() {
	case pb.RejectReason_REJECT_REASON_STALE_SEQUENCE:
		if r.GetField() == "sequence" {
			// Already held by the gateway; its acknowledgement covers it.
			c.st.Stale++
			return
		}
		// Stale by another field (a device time not after the last one
		// the gateway accepted): refused, not held. Final, like any
		// other rejection.
	case pb.RejectReason_REJECT_REASON_RATE_LIMITED:
		// Pause, then resend from this message.
		c.st.RateLimited++
		if it != nil && !it.done && it.seq <= c.sentThrough {
			c.sentThrough = it.seq - 1
		}
		c.holdOff = min(max(2*c.holdOff, 50*time.Millisecond), 2*time.Second)
		c.holdUntil = time.Now().Add(c.holdOff)
		return
	}
	if it == nil || it.done {
		return
	}
	it.done = true
	key := reasonName(r.GetReason()) + " " + r.GetField()
	c.st.Rejections[key] += uint64(it.samples)
	c.st.SamplesRejected += uint64(it.samples)
	c.opts.Logf("gateway rejected message %d (%d samples): %s: %s", it.seq, it.samples, r.GetField(), r.GetDetail())
	advanced := false
	for c.head < len(c.items) && c.items[c.head].done {
		c.finished = max(c.finished, c.items[c.head].seq)
		c.pop()
		advanced = true
	}
	if advanced {
		c.settle()
	}
}

// reasonName is the short name of a rejection reason.
func reasonName(r pb.RejectReason) string {
	switch r {
	case pb.RejectReason_REJECT_REASON_INVALID_FIELD:
		return "invalid_field"
	case pb.RejectReason_REJECT_REASON_NOT_INTRODUCED:
		return "not_introduced"
	case pb.RejectReason_REJECT_REASON_TOO_LARGE:
		return "too_large"
	case pb.RejectReason_REJECT_REASON_WRONG_MODE:
		return "wrong_mode"
	case pb.RejectReason_REJECT_REASON_STALE_SEQUENCE:
		return "stale"
	}
	return "other"
}
