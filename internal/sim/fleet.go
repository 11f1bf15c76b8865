package sim

import (
	"container/heap"
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"sync"
	"sync/atomic"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/sim/scenario"
)

// counters are the fleet's totals, updated by every device.
type counters struct {
	framesSent, samplesSent, framesAcked, samplesAcked  atomic.Uint64
	rejected, rejectedValid, stale, corruptSent         atomic.Uint64
	corruptAcked, corruptSkipped, resent, reconnects    atomic.Uint64
	drops, redirects, streamErrors, renumbered, regress atomic.Uint64
	overflow, statuses, rejectedOther, rateLimited      atomic.Uint64
	outstanding, connected                              atomic.Int64
	lastAck                                             atomic.Int64 // since t0, ns, of the latest acknowledgement
}

// fleet is one run.
type fleet struct {
	opts    Options
	sc      *scenario.Scenario
	speed   float64
	rate    float64
	chunk   int
	t0      time.Time     // wall clock at scenario time 0
	startMs int64         // device clock at scenario time 0, ms since the epoch
	end     time.Duration // since t0: no chunk is due after this (0 = open-ended)
	scEnd   float64       // scenario seconds after which nothing is generated (0 = open)
	maxBuf  int
	hist    Histogram
	c       counters
	devices []*device

	connMu sync.Mutex
	conns  map[string][]*grpc.ClientConn

	errMu   sync.Mutex
	lastErr string

	draining atomic.Bool
}

// Run drives a fleet until its duration is over, waits up to Options.Drain
// for outstanding acknowledgements and reports. When ctx ends first the run
// stops at once, without draining, and still reports.
func Run(ctx context.Context, opts Options) (*Report, error) {
	if err := opts.check(); err != nil {
		return nil, err
	}
	f, horizon := newFleet(opts)

	rng := rand.New(rand.NewPCG(opts.Seed, 0xf1ee7))
	for i := range f.sc.Devices {
		d, err := newDevice(f, i, &f.sc.Devices[i], horizon, rng)
		if err != nil {
			return nil, err
		}
		f.devices = append(f.devices, d)
	}
	defer f.closeConns()

	runCtx, stopRun := context.WithCancel(ctx)
	defer stopRun()
	var sessions sync.WaitGroup
	for _, d := range f.devices {
		sessions.Add(1)
		go func() {
			defer sessions.Done()
			d.session(runCtx, &sessions)
		}()
	}
	stopProgress := f.progress(runCtx)

	f.drive(ctx)
	sendEnd := time.Now()
	if ctx.Err() == nil {
		f.drain()
	}
	stopRun()
	sessions.Wait()
	stopProgress()
	return f.report(sendEnd.Sub(f.t0)), nil
}

// newFleet sets a fleet up from checked opts: its scenario, speed, rate,
// chunking, run length and the device clock at the start; horizon is the
// span of scenario time the devices are generated for.
func newFleet(opts Options) (f *fleet, horizon time.Duration) {
	f = &fleet{opts: opts, conns: map[string][]*grpc.ClientConn{}}
	f.sc = opts.Scenario
	if f.sc == nil {
		prefix := opts.IDPrefix
		if prefix == "" {
			prefix = "sim"
		}
		f.sc = scenario.Generic(opts.Devices, prefix, opts.Seed)
	}
	f.speed = firstNonZero(opts.Speed, f.sc.Speed, 1)
	f.rate = firstNonZero(opts.RateHz, f.sc.RateHz, 100)
	f.chunk = opts.Chunk
	if f.chunk == 0 {
		f.chunk = 25
	}
	f.maxBuf = opts.MaxBuffered
	if f.maxBuf == 0 {
		f.maxBuf = 6000
	}
	dur := opts.Duration
	if dur == 0 && f.sc.Duration > 0 {
		dur = time.Duration(float64(f.sc.Duration) / f.speed)
	}
	f.scEnd = f.sc.Duration.Seconds()
	horizon = f.sc.Duration
	if horizon == 0 || (dur > 0 && time.Duration(float64(dur)*f.speed) < horizon) {
		horizon = time.Duration(float64(dur) * f.speed)
	}
	if horizon == 0 {
		horizon = 24 * time.Hour // open-ended: background events for a day of scenario time
	}

	f.t0 = time.Now()
	f.end = dur
	start := opts.Start
	if start.IsZero() {
		// Time compression replays the past: device clocks start early
		// enough to reach the wall clock when the run ends (the gateway
		// refuses device times ahead of its clock; internal/ingest/doc.go).
		span := horizon
		if dur > 0 {
			span = time.Duration(float64(dur) * f.speed)
		}
		start = f.t0
		if f.speed > 1 {
			start = f.t0.Add(-(span - time.Duration(float64(span)/f.speed)))
		}
	}
	f.startMs = start.UnixMilli()
	return f, horizon
}

func firstNonZero(v ...float64) float64 {
	for _, x := range v {
		if x != 0 {
			return x
		}
	}
	return 0
}

// drive runs the workers until every device is past its end or ctx ends.
func (f *fleet) drive(ctx context.Context) {
	w := f.opts.Workers
	if w == 0 {
		w = min(32, max(1, len(f.devices)/50), 16*runtime.GOMAXPROCS(0))
	}
	w = min(w, len(f.devices))
	shards := make([]deviceHeap, w)
	// Contiguous shards: a worker's devices share one or two connections,
	// so the chunks of one wake-up reach the transport together and go out
	// in few writes.
	for i, d := range f.devices {
		shards[i*w/len(f.devices)] = append(shards[i*w/len(f.devices)], d)
	}
	var wg sync.WaitGroup
	for i := range shards {
		wg.Add(1)
		go func(h deviceHeap) {
			defer wg.Done()
			f.work(ctx, h)
		}(shards[i])
	}
	wg.Wait()
}

// slack lets a worker send chunks due within this window in one wake-up
// (fewer wake-ups, larger writes); a chunk goes out at most this early.
var slack = 5 * time.Millisecond

func (f *fleet) work(ctx context.Context, h deviceHeap) {
	heap.Init(&h)
	timer := time.NewTimer(time.Hour)
	defer timer.Stop()
	for len(h) > 0 {
		now := time.Since(f.t0)
		for len(h) > 0 && h[0].due <= now+slack {
			d := h[0]
			if d.tick(now) {
				heap.Fix(&h, 0)
			} else {
				heap.Pop(&h)
			}
			if ctx.Err() != nil {
				return
			}
		}
		if len(h) == 0 {
			return
		}
		timer.Reset(h[0].due - time.Since(f.t0))
		select {
		case <-ctx.Done():
			return
		case <-timer.C:
		}
	}
}

// deviceHeap orders devices by the due time of their next chunk.
type deviceHeap []*device

func (h deviceHeap) Len() int           { return len(h) }
func (h deviceHeap) Less(i, j int) bool { return h[i].due < h[j].due }
func (h deviceHeap) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *deviceHeap) Push(x any)        { *h = append(*h, x.(*device)) }
func (h *deviceHeap) Pop() any {
	old := *h
	d := old[len(old)-1]
	*h = old[:len(old)-1]
	return d
}

// drain waits for outstanding acknowledgements, with every device online.
func (f *fleet) drain() {
	wait := f.opts.Drain
	if wait == 0 {
		wait = 10 * time.Second
	}
	if wait < 0 {
		return
	}
	f.draining.Store(true)
	for _, d := range f.devices {
		d.setOnline(true)
	}
	deadline := time.Now().Add(wait)
	tick := time.NewTicker(20 * time.Millisecond)
	defer tick.Stop()
	for i := 0; f.c.outstanding.Load() > 0 && time.Now().Before(deadline); i++ {
		if i%5 == 0 {
			// Messages a worker could not send on its last tick (another
			// goroutine held the stream) go out now.
			for _, d := range f.devices {
				d.flush(false)
			}
		}
		<-tick.C
	}
}

// conn returns the shared connection for device idx at addr.
func (f *fleet) conn(addr string, idx int) (*grpc.ClientConn, error) {
	per := f.opts.DevicesPerConn
	if per == 0 {
		per = 500
	}
	slot := idx / per // at any address: redirected devices share connections the same way
	f.connMu.Lock()
	defer f.connMu.Unlock()
	cs := f.conns[addr]
	for len(cs) <= slot {
		cs = append(cs, nil)
	}
	f.conns[addr] = cs
	if cs[slot] == nil {
		dial := append([]grpc.DialOption{grpc.WithTransportCredentials(insecure.NewCredentials())}, f.opts.DialOptions...)
		c, err := grpc.NewClient(addr, dial...)
		if err != nil {
			return nil, fmt.Errorf("connect %s: %w", addr, err)
		}
		cs[slot] = c
	}
	return cs[slot], nil
}

func (f *fleet) closeConns() {
	f.connMu.Lock()
	defer f.connMu.Unlock()
	for _, cs := range f.conns {
		for _, c := range cs {
			if c != nil {
				c.Close()
			}
		}
	}
}

func (f *fleet) noteErr(err error) {
	f.errMu.Lock()
	f.lastErr = err.Error()
	f.errMu.Unlock()
}

// progress prints a line every ProgressEvery until the returned stop is called.
func (f *fleet) progress(ctx context.Context) (stop func()) {
	if f.opts.Progress == nil {
		return func() {}
	}
	every := f.opts.ProgressEvery
	if every == 0 {
		every = 5 * time.Second
	}
	pctx, cancel := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() {
		defer close(done)
		t := time.NewTicker(every)
		defer t.Stop()
		var lastSamples uint64
		last := time.Now()
		for {
			select {
			case <-pctx.Done():
				return
			case now := <-t.C:
				acked := f.c.framesAcked.Load() // before sent: see report
				sent := f.c.framesSent.Load()
				s := f.c.samplesAcked.Load()
				rate := float64(s-lastSamples) / now.Sub(last).Seconds()
				lastSamples, last = s, now
				fmt.Fprintf(f.opts.Progress, "sim: %5.0fs connected=%d/%d sent=%d acked=%d rejected=%d reconnects=%d acked_samples/s=%.0f ack_p99_ms=%.1f\n",
					now.Sub(f.t0).Seconds(), f.c.connected.Load(), len(f.devices), sent,
					acked, f.c.rejected.Load(), f.c.reconnects.Load(), rate, f.hist.Quantile(0.99))
			}
		}
	}()
	return func() { cancel(); <-done }
}

func (f *fleet) report(sending time.Duration) *Report {
	c := &f.c
	// Acknowledged before sent: every message is counted sent before it can
	// be acknowledged, so read in this order sent is never below acked.
	framesAcked, samplesAcked := c.framesAcked.Load(), c.samplesAcked.Load()
	r := &Report{
		Devices: len(f.devices), FramesSent: c.framesSent.Load(), FramesAcked: framesAcked,
		SamplesSent: c.samplesSent.Load(), Rejected: c.rejected.Load(),
		AckP50Ms: round3(f.hist.Quantile(0.5)), AckP99Ms: round3(f.hist.Quantile(0.99)),
		SamplesAcked: samplesAcked, CorruptSent: c.corruptSent.Load(),
		CorruptAcked: c.corruptAcked.Load(), CorruptSkipped: c.corruptSkipped.Load(),
		RejectedValid: c.rejectedValid.Load(), Stale: c.stale.Load(), DuplicatesResent: c.resent.Load(),
		Reconnects: c.reconnects.Load(), DropsInjected: c.drops.Load(), Redirects: c.redirects.Load(),
		StreamErrors: c.streamErrors.Load(), Renumbered: c.renumbered.Load(), ResumeRegress: c.regress.Load(),
		OverflowDropped: c.overflow.Load(), StatusesSent: c.statuses.Load(), RejectedOther: c.rejectedOther.Load(), RateLimited: c.rateLimited.Load(),
		DurationS: round3(sending.Seconds()), Speed: f.speed,
		PerDevice: make(map[string]DeviceReport, len(f.devices)),
	}
	if span := max(sending, time.Duration(c.lastAck.Load())); span > 0 {
		r.SamplesPerS = math.Round(float64(r.SamplesAcked) / span.Seconds())
	}
	f.errMu.Lock()
	r.LastError = f.lastErr
	f.errMu.Unlock()
	for _, d := range f.devices {
		d.mu.Lock()
		r.UnackedAtEnd += uint64(d.unacked())
		r.PerDevice[d.id] = DeviceReport{FramesAcked: d.framesAcked, SamplesAcked: d.samplesAcked,
			AckedThrough: d.ackedThrough, Mode: d.mode}
		d.mu.Unlock()
	}
	return r
}

func round3(x float64) float64 { return math.Round(x*1000) / 1000 }
