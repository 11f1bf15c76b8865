package uplink

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Options configure a Client.
type Options struct {
	// Address is the gateway's gRPC address, host:port (required).
	Address string
	// Fallbacks are more gateways of the same fleet. A redirect is followed
	// only while it works: after an attempt that was not welcomed (the
	// gateway is down, or cannot take the device now) the client tries the
	// next of Address and Fallbacks, whose gateway redirects it to the
	// device's owner again. Empty = back to Address.
	Fallbacks []string
	// Dial opens a connection to a gateway address (required): the caller
	// chooses transport security.
	Dial func(addr string) (*grpc.ClientConn, error)
	// Token is sent as "authorization: Bearer TOKEN" when not empty.
	Token string
	// Intro is the device's introduction (required).
	Intro *pb.Introduction
	// SpoolDir keeps held messages in DIR/uplink.spool; "" keeps them in memory.
	SpoolDir string
	// SpoolMeta describes the owner of a new spool (JSON); an existing
	// spool's is returned by Recovered.Meta for the caller to check.
	SpoolMeta json.RawMessage
	// MaxBytes bounds the encoded size of the messages held (not yet
	// acknowledged), in memory or in the spool; 0 means 64 MiB.
	MaxBytes int64
	// Logf reports connection events for a person; nil discards them.
	Logf func(format string, args ...any)
	// Backoff is the reconnect schedule; the zero value is 100 ms growing
	// by 1.6 up to 5 s, with jitter.
	Backoff Backoff
}

// Recovered is what a spool held when the client was made.
type Recovered struct {
	Messages int             // messages still to deliver
	Samples  int             // their samples
	Mark     []byte          // the caller's mark of the last message ever added (nil if none)
	Meta     json.RawMessage // the spool's owner description
	CutBytes int64           // torn tail cut off (a crash in the middle of a write)
}

// Stats are a client's counters since it was made.
type Stats struct {
	SamplesAdded    uint64            // taken by Add
	SamplesSent     uint64            // sent at least once
	SamplesAcked    uint64            // acknowledged as durable (including recovered ones)
	SamplesRejected uint64            // finally rejected by the gateway
	Rejections      map[string]uint64 // samples finally rejected, by "reason field"
	Resent          uint64            // messages sent again after a reconnect or a pause
	Stale           uint64            // resends the gateway already held
	RateLimited     uint64            // pauses the gateway asked for
	Reconnects      uint64            // streams opened after the first
	Redirects       uint64            // redirects followed
	Renumbered      uint64            // times the held messages were renumbered after the gateway's
	ResumeRegress   uint64            // welcomes resuming below what was acknowledged before (normal after a move between gateways of a fleet)
	HeldMessages    int               // held now
	HeldSamples     int64             // held now
	HeldBytes       int64             // held now
	HeldMaxSamples  int64             // largest HeldSamples seen
	HeldMaxBytes    int64             // largest HeldBytes seen
	Connected       bool              // a welcomed stream is open
	LastError       string            // the last stream error, for progress lines
}

// ErrFull is returned by a non-blocking Add when the held messages reach
// Options.MaxBytes.
var ErrFull = errors.New("uplink: buffer full")

type item struct {
	seq     uint64
	samples int
	size    int
	mark    []byte
	msg     *pb.ConnectRequest // nil while only in the spool
	off     int64              // spool: offset and length of the message
	n       int
	sent    bool // sent at least once
	done    bool // finally rejected
}

// Client streams one device's messages. Make it with New, run it with Run
// and add messages with Add from any goroutine.
type Client struct {
	opts  Options
	intro *pb.ConnectRequest
	sp    *spool
	meta  []byte

	mu          sync.Mutex
	items       []*item // held, consecutive sequence numbers from items[head]
	head        int
	nextSeq     uint64
	finished    uint64 // every message up to here is acknowledged or finally rejected
	sentThrough uint64 // highest sequence sent on the current stream
	welcomed    bool
	lastMark    []byte
	holdUntil   time.Time
	holdOff     time.Duration
	addr        string
	st          Stats
	failed      error         // a spool failure: nothing more can be taken
	changed     chan struct{} // closed and replaced when something is acknowledged
	kick        chan struct{} // cap 1: something to send
}

// New makes a client; with a spool it recovers what the spool holds.
func New(opts Options) (*Client, *Recovered, error) {
	if opts.Address == "" || opts.Dial == nil || opts.Intro == nil {
		return nil, nil, errors.New("uplink: Address, Dial and Intro are required")
	}
	if opts.MaxBytes <= 0 {
		opts.MaxBytes = 64 << 20
	}
	if opts.Logf == nil {
		opts.Logf = func(string, ...any) {}
	}
	c := &Client{opts: opts, nextSeq: 1, addr: opts.Address, changed: make(chan struct{}), kick: make(chan struct{}, 1),
		intro: &pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: opts.Intro}}}
	c.st.Rejections = map[string]uint64{}
	rec := &Recovered{}
	if opts.SpoolDir != "" {
		sp, r, err := openSpool(opts.SpoolDir, opts.SpoolMeta)
		if err != nil {
			return nil, nil, err
		}
		c.sp, c.meta = sp, r.meta
		c.welcomed, c.finished, c.lastMark = r.welcomed, r.finished, r.lastMark
		c.items = r.items
		c.nextSeq = max(r.lastSeq, r.finished) + 1
		for _, it := range r.items {
			it.size = it.n + 8
			c.st.HeldBytes += int64(it.size)
			c.st.HeldSamples += int64(it.samples)
			rec.Samples += it.samples
		}
		c.st.HeldMessages = len(r.items)
		c.st.HeldMaxBytes, c.st.HeldMaxSamples = c.st.HeldBytes, c.st.HeldSamples
		rec.Messages, rec.Mark, rec.Meta, rec.CutBytes = len(r.items), r.lastMark, r.meta, r.cut
	}
	return c, rec, nil
}

// Close syncs and closes the spool. Call it after Run has returned.
func (c *Client) Close() error {
	if c.sp == nil {
		return nil
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.sp.close()
}

// Stats returns a copy of the counters.
func (c *Client) Stats() Stats {
	c.mu.Lock()
	defer c.mu.Unlock()
	s := c.st
	s.Rejections = make(map[string]uint64, len(c.st.Rejections))
	for k, v := range c.st.Rejections {
		s.Rejections[k] = v
	}
	return s
}

// setSeq sets the sequence number inside a data message.
func setSeq(m *pb.ConnectRequest, seq uint64) {
	switch k := m.Kind.(type) {
	case *pb.ConnectRequest_RawChunk:
		k.RawChunk.Sequence = seq
	case *pb.ConnectRequest_Summary:
		k.Summary.Sequence = seq
	}
}

// Add numbers a data message (raw chunk or summary) holding samples
// samples and keeps it until the gateway acknowledges it; mark is the
// caller's note of where its input stood after this message (kept in the
// spool, returned by New as Recovered.Mark). When the held messages reach
// Options.MaxBytes, Add waits for acknowledgements if block is true and
// returns ErrFull otherwise. With a spool the message is in the spool file
// when Add returns. Add takes ownership of m.
func (c *Client) Add(ctx context.Context, m *pb.ConnectRequest, samples int, mark []byte, block bool) error {
	size := proto.Size(m) + 8
	c.mu.Lock()
	for {
		if c.failed != nil {
			c.mu.Unlock()
			return c.failed
		}
		if c.st.HeldBytes == 0 || c.st.HeldBytes+int64(size) <= c.opts.MaxBytes {
			break
		}
		if !block {
			c.mu.Unlock()
			return ErrFull
		}
		ch := c.changed
		c.mu.Unlock()
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-ch:
		}
		c.mu.Lock()
	}
	defer c.mu.Unlock()
	it := &item{seq: c.nextSeq, samples: samples, size: size, mark: mark, msg: m}
	setSeq(m, it.seq)
	if c.sp != nil {
		b, err := proto.Marshal(m)
		if err != nil {
			return fmt.Errorf("uplink: encode message: %w", err)
		}
		if err := c.sp.addData(it, b); err != nil {
			c.failed = err
			return err
		}
		it.msg = nil
	}
	c.nextSeq++
	c.lastMark = mark
	c.items = append(c.items, it)
	c.st.SamplesAdded += uint64(samples)
	c.st.HeldMessages++
	c.st.HeldBytes += int64(it.size)
	c.st.HeldSamples += int64(samples)
	c.st.HeldMaxBytes = max(c.st.HeldMaxBytes, c.st.HeldBytes)
	c.st.HeldMaxSamples = max(c.st.HeldMaxSamples, c.st.HeldSamples)
	select {
	case c.kick <- struct{}{}:
	default:
	}
	return nil
}

// Wait returns nil once nothing is held (everything added was acknowledged
// or finally rejected), or ctx's error.
func (c *Client) Wait(ctx context.Context) error {
	for {
		c.mu.Lock()
		n, ch, failed := len(c.items)-c.head, c.changed, c.failed
		c.mu.Unlock()
		if failed != nil {
			return failed
		}
		if n == 0 {
			return nil
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-ch:
		}
	}
}

// notify wakes Add and Wait; mu held.
func (c *Client) notify() {
	close(c.changed)
	c.changed = make(chan struct{})
}

// Run connects, streams and reconnects until ctx ends.
func (c *Client) Run(ctx context.Context) {
	var conn *grpc.ClientConn
	var connAddr string
	defer func() {
		if conn != nil {
			conn.Close()
		}
	}()
	timer := time.NewTimer(time.Hour)
	defer timer.Stop()
	b := c.opts.Backoff
	redirects := 0
	for first := true; ctx.Err() == nil; first = false {
		c.mu.Lock()
		addr := c.addr
		if !first {
			c.st.Reconnects++
		}
		c.mu.Unlock()
		var err error
		welcomed := false
		if conn == nil || connAddr != addr {
			if conn != nil {
				conn.Close()
				conn = nil
			}
			conn, err = c.opts.Dial(addr)
			connAddr = addr
		}
		if err == nil {
			welcomed, err = c.stream(ctx, conn, addr)
		}
		if ctx.Err() != nil {
			return
		}
		var re *RedirectError
		var wait time.Duration
		if refused(err) {
			c.giveUp(addr, err)
			return
		}
		switch {
		case errors.As(err, &re):
			redirects++
			c.mu.Lock()
			c.st.Redirects++
			if re.Address != "" {
				c.addr = re.Address
			}
			c.mu.Unlock()
			c.opts.Logf("gateway %s: device belongs to %s; reconnecting there", addr, re.Address)
			wait = 10 * time.Millisecond
			if redirects > 3 {
				wait = b.Next()
			}
		case welcomed:
			redirects = 0
			b.Reset()
			wait = b.Short()
			if err != nil {
				c.noteErr(err)
				c.opts.Logf("gateway %s: stream ended: %v; reconnecting", addr, err)
			}
		default:
			c.noteErr(err)
			wait = b.Next()
			next := c.nextAddress(addr)
			c.opts.Logf("gateway %s: %v; retrying at %s in %v", addr, err, next, wait.Round(time.Millisecond))
		}
		timer.Reset(wait)
		select {
		case <-ctx.Done():
			return
		case <-timer.C:
		}
	}
}

// giveUp records that gateway addr refused the device for good (err is one
// that retrying cannot cure) and wakes waiters so they see it.
func (c *Client) giveUp(addr string, err error) {
	c.mu.Lock()
	c.failed = fmt.Errorf("gateway %s refused device %s: %w", addr, c.opts.Intro.GetDeviceId(), err)
	c.st.LastError = err.Error()
	c.notify()
	c.mu.Unlock()
	c.opts.Logf("%v; giving up (retrying cannot help)", c.failed)
}

// nextAddress moves the client to the gateway after addr in Address and
// Fallbacks (to Address when addr is a redirect target) and returns it.
func (c *Client) nextAddress(addr string) string {
	all := append([]string{c.opts.Address}, c.opts.Fallbacks...)
	next := all[0]
	for i, a := range all {
		if a == addr {
			next = all[(i+1)%len(all)]
			break
		}
	}
	c.mu.Lock()
	c.addr = next
	c.mu.Unlock()
	return next
}

// refused reports an answer that retrying cannot change: an introduction
// the gateway rejects, a missing or wrong credential.
func refused(err error) bool {
	var rj *RejectedError
	if errors.As(err, &rj) {
		return true
	}
	switch status.Code(err) {
	case codes.Unauthenticated, codes.PermissionDenied:
		return true
	}
	return false
}

// Err returns why the client gave up (a refused introduction or
// credential, a spool that cannot be written), or nil.
func (c *Client) Err() error {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.failed
}

func (c *Client) noteErr(err error) {
	if err == nil {
		return
	}
	c.mu.Lock()
	c.st.LastError = err.Error()
	c.mu.Unlock()
}
