package sim

// A device's connection to a gateway: the session loop that connects and
// reconnects with backoff, the Welcome that sets where numbering resumes,
// and the answers (Ack, Rejection, Redirect) read off the stream.

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sync"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pulsefleetv1 "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/uplink"
)

// breakStream ends stream s (nil = whichever is current) if it is still the
// current one, on purpose (planned) or after a send failed; it reports
// whether it ended one.
func (d *device) breakStream(s pulsefleetv1.IngestService_ConnectClient, planned bool) bool {
	d.mu.Lock()
	if d.stream == nil || (s != nil && d.stream != s) {
		d.mu.Unlock()
		return false
	}
	cancel := d.cancel
	d.stream, d.cancel = nil, nil
	d.breakPlanned = planned
	d.mu.Unlock()
	cancel()
	return true
}

// errPlanned marks a stream the simulator ended on purpose.
var errPlanned = errors.New("stream ended by the simulator")

// session owns the device's connection: it connects while the device wants
// to be online, receives, and reconnects with backoff. helpers tracks the
// short-lived goroutines that resend after a reconnect.
func (d *device) session(ctx context.Context, helpers *sync.WaitGroup) {
	var b uplink.Backoff // 100 ms growing by 1.6 to 5 s, with jitter
	timer := time.NewTimer(time.Hour)
	defer timer.Stop()
	opened := false
	for ctx.Err() == nil {
		if !d.online.Load() {
			select {
			case <-ctx.Done():
				return
			case <-d.kick:
			}
			continue
		}
		if opened {
			d.f.c.reconnects.Add(1)
		}
		opened = true
		welcomed, err := d.connect(ctx, helpers)
		if ctx.Err() != nil {
			return
		}
		wait := time.Duration(0)
		switch {
		case errors.Is(err, errRedirect):
			wait = 10 * time.Millisecond
		case welcomed && (err == nil || errors.Is(err, errPlanned)):
			b.Reset()
			wait = b.Short()
		default:
			if err != nil && !errors.Is(err, errPlanned) {
				d.f.c.streamErrors.Add(1)
				d.f.noteErr(fmt.Errorf("device %s: %w", d.id, err))
			}
			// A gateway whose store is full (RESOURCE_EXHAUSTED) is given
			// time: the backoff keeps growing even after a welcome.
			if welcomed && !backOffFor(err) {
				b.Reset()
			}
			wait = b.Next()
			if !welcomed {
				d.nextGateway()
			}
		}
		timer.Reset(wait)
		select {
		case <-ctx.Done():
			return
		case <-timer.C:
		}
	}
}

var errRedirect = errors.New("redirected")

// connect runs one stream until it ends; welcomed says whether the gateway
// accepted the introduction.
func (d *device) connect(ctx context.Context, helpers *sync.WaitGroup) (welcomed bool, err error) {
	d.mu.Lock()
	addr := d.addr
	d.mu.Unlock()
	conn, err := d.f.conn(addr, d.idx)
	if err != nil {
		return false, err
	}
	sctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st, w, err := uplink.Open(sctx, conn, d.token, d.intro)
	var re *uplink.RedirectError
	switch {
	case errors.As(err, &re):
		d.redirect(&pulsefleetv1.Redirect{Address: re.Address, Detail: re.Detail})
		return false, errRedirect
	case err != nil:
		return false, fmt.Errorf("%s: %w", addr, err)
	}
	d.welcome(w.GetResumeAfterSequence(), st, cancel)
	d.f.c.connected.Add(1)
	defer d.f.c.connected.Add(-1)
	helpers.Add(1)
	go func() {
		defer helpers.Done()
		d.flush(true)
	}()
	for {
		m, err := st.Recv()
		if err != nil {
			planned := d.detach(st)
			if planned || errors.Is(err, io.EOF) && ctx.Err() != nil {
				return true, errPlanned
			}
			return true, err
		}
		switch k := m.Kind.(type) {
		case *pulsefleetv1.ConnectResponse_Ack:
			d.onAck(k.Ack.GetThroughSequence())
		case *pulsefleetv1.ConnectResponse_Rejection:
			d.onReject(k.Rejection)
		case *pulsefleetv1.ConnectResponse_Redirect:
			d.redirect(k.Redirect)
			d.breakStream(st, true)
			return true, errRedirect
		}
	}
}

// detach forgets st after it ended; it reports whether the simulator had
// ended it on purpose.
func (d *device) detach(st pulsefleetv1.IngestService_ConnectClient) (planned bool) {
	d.mu.Lock()
	defer d.mu.Unlock()
	if d.stream == st {
		d.stream, d.cancel = nil, nil
		return false
	}
	return d.breakPlanned
}

// nextGateway moves the device to the next of Options.Gateway and
// Options.Fallbacks after an attempt that was not welcomed (the gateway it
// used is down or cannot take it now).
func (d *device) nextGateway() {
	fb := d.f.opts.Fallbacks
	if len(fb) == 0 {
		return
	}
	all := append([]string{d.f.opts.Gateway}, fb...)
	d.mu.Lock()
	defer d.mu.Unlock()
	next := all[0]
	for i, a := range all {
		if a == d.addr {
			next = all[(i+1)%len(all)]
			break
		}
	}
	d.addr = next
}

func (d *device) redirect(r *pulsefleetv1.Redirect) {
	d.f.c.redirects.Add(1)
	if r.GetAddress() == "" {
		return
	}
	d.mu.Lock()
	d.addr = r.GetAddress()
	d.mu.Unlock()
}

// welcome applies the gateway's resume point and makes st the stream.
func (d *device) welcome(resume uint64, st pulsefleetv1.IngestService_ConnectClient, cancel context.CancelFunc) {
	d.sendMu.Lock()
	defer d.sendMu.Unlock()
	d.mu.Lock()
	defer d.mu.Unlock()
	f := d.f
	if resume < d.ackedThrough {
		f.c.regress.Add(1)
	}
	if !d.welcomed && resume > 0 {
		// A device whose id the gateway knows from an earlier life: its
		// numbering continues after the gateway's. Nothing can have been
		// sent before the first Welcome, so renumbering is safe.
		f.c.renumbered.Add(1)
		for i, c := range d.buf[d.head:] {
			c.setSeq(resume + 1 + uint64(i))
		}
		d.nextSeq = resume + 1 + uint64(len(d.buf)-d.head)
	}
	now := f.since()
	for d.head < len(d.buf) && d.buf[d.head].seq <= resume {
		c := d.buf[d.head]
		if !c.done && c.corrupt {
			f.c.corruptSkipped.Add(1)
			c.done = true
		}
		d.acked(c, now, false)
		d.popFront()
	}
	d.nextSeq = max(d.nextSeq, resume+1)
	d.ackedThrough = max(d.ackedThrough, resume)
	d.sentThrough = resume
	d.welcomed = true
	d.stream, d.cancel = st, cancel
}

func (d *device) onAck(through uint64) {
	now := d.f.since()
	d.f.c.lastAck.Store(int64(now))
	d.mu.Lock()
	defer d.mu.Unlock()
	for d.head < len(d.buf) && d.buf[d.head].seq <= through {
		d.acked(d.buf[d.head], now, true)
		d.popFront()
	}
	d.ackedThrough = max(d.ackedThrough, through)
	d.holdOff = 0
}

func (d *device) onReject(r *pulsefleetv1.Rejection) {
	f := d.f
	stale := r.GetReason() == pulsefleetv1.RejectReason_REJECT_REASON_STALE_SEQUENCE
	if stale {
		f.c.stale.Add(1)
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	c := d.find(r.GetSequence())
	if r.GetReason() == pulsefleetv1.RejectReason_REJECT_REASON_RATE_LIMITED {
		// The gateway asks the device to slow down and resend from this
		// sequence number: rewind and hold off sending for a while.
		f.c.rateLimited.Add(1)
		if c != nil && !c.done && c.seq <= d.sentThrough {
			d.sentThrough = c.seq - 1
		}
		d.holdOff = min(max(2*d.holdOff, 50*time.Millisecond), 2*time.Second)
		d.holdUntil = f.since() + d.holdOff
		return
	}
	if c == nil || c.done {
		if !stale {
			f.c.rejectedOther.Add(1)
		}
		return
	}
	switch {
	case stale && c.corrupt:
		f.c.corruptSkipped.Add(1)
		c.done = true
	case stale:
		d.acked(c, f.since(), false)
	default:
		f.c.rejected.Add(1)
		if !c.corrupt {
			f.c.rejectedValid.Add(1)
		}
		c.done = true
	}
	for d.head < len(d.buf) && d.buf[d.head].done {
		d.popFront()
	}
}

// backOffFor reports whether a stream's end asks the device to slow down
// its reconnects: RESOURCE_EXHAUSTED (the gateway's store is full, or too
// many streams). UNAVAILABLE (a stream ended to rebalance, a shutdown, a
// failed write) keeps the quick reconnect after a welcome.
func backOffFor(err error) bool {
	return status.Code(err) == codes.ResourceExhausted // also when wrapped
}
