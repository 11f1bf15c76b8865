package gateway

import (
	"context"
	"errors"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"io"
	"math"
	"runtime/debug"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/peer"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Limits on a stream.
const (
	introTimeout          = 30 * time.Second
	maxRejectsBeforeIntro = 100
	sendQueue             = 64
	// sendStall: a stream whose device has not taken an answer for this
	// long (one Send blocked: the transport's buffers for it, about 128 KiB,
	// are full because the device does not read) is ended. The watchdog
	// checks every Options.WatchdogEvery, so it ends within sendStall plus
	// that.
	sendStall = 20 * time.Second
	// senderDrain bounds how long an ending stream waits for its sender to
	// deliver the answers and ack already due; the device id is free for a
	// new stream before that wait.
	senderDrain = 2 * time.Second
)

// stream is one open Connect call of one device.
type stream struct {
	g      *Gateway
	dev    *device
	grpc   pb.IngestService_ConnectServer
	ctx    context.Context // the handler's; cancelled with a cause
	cancel context.CancelCauseFunc
	ended  chan struct{} // closed when the handler has returned
	remote string
	id     string

	epoch    uint64 // the device's write epoch this stream feeds (set when attached)
	attached bool   // start made it the device's stream: finish must run

	acked   atomic.Uint64 // durable through this sequence (set by the writer)
	msgs    chan *pb.ConnectRequest
	recvErr chan error
	// Output: the handler (and the writer, for acks) queue, the sender
	// goroutine sends, so the handler never blocks on a device that does
	// not read. Bounded: beyond sendQueue, messages are dropped and counted.
	outMu        sync.Mutex
	outq         []*pb.ConnectResponse
	drops        uint64
	wake         chan struct{} // cap 1: output or an ack is due
	closing      chan struct{} // closed by the handler: send what is due and stop
	senderDone   chan struct{}
	sendingSince atomic.Int64 // wall-clock ms when the Send in progress began, 0 when none
	mode         pb.Mode
	adc          uint32
	redNM        float64
	irNM         float64
	calRef       string
	cal          estimator.Calibration
	bucket       tokenBucket // message-rate limit (ratelimit.go)
	span         tokenBucket // device-time rate limit, in device seconds (ratelimit.go)

	// raw pipeline (owned by the handler goroutine)
	tl     *estimator.Timeline // nil until the first raw chunk
	estOut []estimator.TimedEstimate
}

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
// sendQueue messages wait (a device that does not read its stream), it is
// dropped and counted rather than held.
func (s *stream) send(m *pb.ConnectResponse) {
	s.outMu.Lock()
	if len(s.outq) >= sendQueue {
		s.drops++
		s.outMu.Unlock()
		return
	}
	s.outq = append(s.outq, m)
	s.outMu.Unlock()
	select {
	case s.wake <- struct{}{}:
	default:
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
	err := s.grpc.Send(m)
	s.sendingSince.Store(0)
	return err
}

var errSendStalled = fmt.Errorf("the device did not read its answers for %v", sendStall)

// checkStall ends the stream when one Send has been blocked for sendStall
// (the watchdog calls it). Wall clock: it measures the transport, not the
// gateway's injected clock.
func (s *stream) checkStall() {
	if t := s.sendingSince.Load(); t != 0 && time.Now().UnixMilli()-t > s.g.opt.sendStall.Milliseconds() {
		if context.Cause(s.ctx) == nil {
			s.g.m.sendStalls.Inc()
		}
		s.cancel(errSendStalled)
	}
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
	s.g.m.rejected.WithLabelValues(reasonLabel(r.Reason)).Inc()
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

// Connect implements IngestService.
func (g *Gateway) Connect(gs pb.IngestService_ConnectServer) (err error) {
	ctx, cancel := context.WithCancelCause(gs.Context())
	defer cancel(nil)
	s := &stream{g: g, grpc: gs, ctx: ctx, cancel: cancel, ended: make(chan struct{}),
		wake: make(chan struct{}, 1), closing: make(chan struct{}), senderDone: make(chan struct{}),
		msgs: make(chan *pb.ConnectRequest), recvErr: make(chan error, 1)}
	if p, ok := peer.FromContext(ctx); ok {
		s.remote = p.Addr.String()
	}
	// Three goroutines serve a stream: this handler (validate, estimate,
	// evaluate, queue for the writer), the reader, which owns Recv, and the
	// sender, which owns Send, so the handler can end the RPC at once when
	// the stream is cancelled (gRPC's Recv and Send do not see a derived
	// context; they return when the RPC ends).
	go s.reader(ctx)
	go s.sender()
	// Whatever way the stream ends, answers and acks already due go out.
	defer s.drainSender()
	defer close(s.ended)
	defer func() {
		if p := recover(); p != nil {
			g.m.panics.Inc()
			g.log.Error("panic in device stream", "device", s.devID(), "panic", p, "stack", string(debug.Stack()))
			err = status.Errorf(codes.Internal, "internal error in this stream (recovered; the gateway goes on)")
		}
	}()
	defer func() {
		if s.attached {
			s.finish(ctx)
		}
	}()

	if err := s.introduce(ctx); err != nil {
		return s.endStatus(ctx, err)
	}
	return s.endStatus(ctx, s.loop(ctx))
}

// endStatus turns the reason a stream ended into the status the device
// reads: nil for its own end, RESOURCE_EXHAUSTED or UNAVAILABLE when the
// store failed (back off, resend from the next welcome's resume point),
// ABORTED when a newer stream replaced it, UNAUTHENTICATED when its
// credential was revoked, UNAVAILABLE at shutdown.
func (s *stream) endStatus(ctx context.Context, err error) error {
	if err == nil || errors.Is(err, io.EOF) {
		return nil
	}
	cause := context.Cause(ctx)
	if cause == nil {
		cause = err
	}
	var sf *storeFault
	switch {
	case errors.As(cause, &sf):
		var resume uint64
		if s.dev != nil {
			s.dev.mu.Lock()
			resume = s.dev.durableSeq
			s.dev.mu.Unlock()
		}
		if store.IsFull(sf.err) {
			return status.Errorf(codes.ResourceExhausted, "store full: %v; back off and resend everything after sequence %d", sf.err, resume)
		}
		return status.Errorf(codes.Unavailable, "store write failed: %v; back off and resend everything after sequence %d", sf.err, resume)
	case errors.Is(cause, errReplaced):
		return status.Error(codes.Aborted, errReplaced.Error())
	case errors.Is(cause, auth.ErrRevoked):
		return status.Error(codes.Unauthenticated, "the stream's credential was revoked")
	case errors.Is(cause, errSendStalled):
		return status.Error(codes.DeadlineExceeded, errSendStalled.Error())
	case s.g.stopping.Load():
		return status.Error(codes.Unavailable, "gateway shutting down; reconnect")
	}
	if _, ok := status.FromError(err); ok {
		return err
	}
	return status.Error(codes.Unavailable, err.Error())
}

func (s *stream) devID() string {
	if s.dev == nil {
		return ""
	}
	return s.dev.id
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
		m, err := s.grpc.Recv()
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

// introduce waits for a valid introduction, rejecting anything else.
func (s *stream) introduce(ctx context.Context) error {
	g := s.g
	timer := time.AfterFunc(introTimeout, func() { s.cancel(errors.New("no introduction")) })
	defer timer.Stop()
	rejects := 0
	for {
		m, err := s.recv(ctx)
		if err != nil {
			if c := context.Cause(ctx); c != nil && c.Error() == "no introduction" {
				return status.Errorf(codes.DeadlineExceeded, "introduction: none within %v of connecting", introTimeout)
			}
			return err
		}
		in := m.GetIntroduction()
		var rej *pb.Rejection
		switch {
		case in == nil:
			rej = reject(seqOf(m), pb.RejectReason_REJECT_REASON_NOT_INTRODUCED, "introduction", "the first message must be an introduction")
		case proto.Size(m) > g.opt.MaxMessageBytes:
			rej = reject(0, pb.RejectReason_REJECT_REASON_TOO_LARGE, "introduction", "%d bytes, want at most %d", proto.Size(m), g.opt.MaxMessageBytes)
		default:
			rej = validateIntroduction(in)
		}
		if rej == nil {
			if err := g.auth.AuthorizeDevice(ctx, in.GetDeviceId()); err != nil {
				return err
			}
			return s.start(ctx, in)
		}
		s.rejectMsg(rej)
		if rejects++; rejects >= maxRejectsBeforeIntro {
			return status.Errorf(codes.InvalidArgument, "introduction: %d messages without a valid introduction; last: %s: %s", rejects, rej.Field, rej.Detail)
		}
	}
}

func seqOf(m *pb.ConnectRequest) uint64 {
	switch k := m.Kind.(type) {
	case *pb.ConnectRequest_RawChunk:
		return k.RawChunk.GetSequence()
	case *pb.ConnectRequest_Summary:
		return k.Summary.GetSequence()
	}
	return 0
}

// start attaches the stream to its device, replacing an older stream, makes
// the description and session durable, and welcomes the device.
func (s *stream) start(ctx context.Context, in *pb.Introduction) error {
	g := s.g
	if addr := g.ownerOf(in.GetDeviceId()); addr != "" {
		s.send(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Redirect{Redirect: &pb.Redirect{Address: addr, Detail: "device " + in.GetDeviceId() + " belongs to the gateway at " + addr}}})
		return status.Errorf(codes.FailedPrecondition, "device %s belongs to the gateway at %s", in.GetDeviceId(), addr)
	}
	d, _ := g.devices.getOrCreate(in.GetDeviceId())
	s.dev = d
	s.mode, s.adc, s.redNM, s.irNM = in.GetMode(), in.GetAdcBits(), in.GetRedWavelengthNm(), in.GetIrWavelengthNm()

	// Replace an older stream of the same device: cancel it and wait until its
	// handler has returned, so only one stream ever feeds the device.
	d.mu.Lock()
	old := d.stream
	d.mu.Unlock()
	if old != nil {
		// The old handler only waits on channels (its reader and sender own
		// the blocking calls), so it ends within milliseconds even when its
		// device neither sends nor reads.
		old.cancel(errReplaced)
		t := time.NewTimer(10 * time.Second)
		select {
		case <-old.ended:
			t.Stop()
		case <-ctx.Done():
			t.Stop()
			return context.Cause(ctx)
		case <-t.C:
			return status.Errorf(codes.Unavailable, "device %s: the previous stream did not end; retry", d.id)
		}
		g.m.replaced.Inc()
		g.audit(ctx, "device:"+d.id, "stream.replace", d.id, "a new stream replaced the open one from "+old.remote, s.remote)
	}

	if s.mode == pb.Mode_MODE_RAW {
		calName := in.GetCalibrationId()
		if calName == "" {
			calName = g.assignedCalibration(d.id, in.GetModel())
		}
		cal, ref, err := g.opt.ResolveCalibration(calName, s.redNM, s.irNM)
		if err != nil {
			s.rejectMsg(invalid(0, "introduction.calibration_id", "%v", err))
			return status.Errorf(codes.InvalidArgument, "introduction.calibration_id: %v", err)
		}
		s.cal, s.calRef = cal, ref
	}

	nowMS := g.nowMS()
	d.mu.Lock()
	d.stream = s
	s.attached = true // from here on, finish undoes what follows whatever happens
	s.epoch = d.epoch.Load()
	d.desc.Model, d.desc.Firmware, d.desc.Labels = in.GetModel(), in.GetFirmware(), in.GetLabels()
	d.desc.Mode = map[pb.Mode]string{pb.Mode_MODE_RAW: "raw", pb.Mode_MODE_SUMMARY: "summary"}[s.mode]
	d.desc.RedNM, d.desc.IRNM, d.desc.ADCBits, d.desc.Calibration = s.redNM, s.irNM, s.adc, s.calRef
	if d.desc.FirstSeenMS == 0 {
		d.desc.FirstSeenMS = nowMS
	}
	d.desc.LastSeenMS = nowMS
	d.q.startSession() // quality accounting
	d.desc.Sessions++
	d.sessionMS = nowMS
	desc := d.desc
	g.ensureEngine(d)
	var evs []alarms.Event
	if d.engine != nil && d.engine.Offline() {
		d.engine.SetOffline(false, d.techNowS(nowMS), func(e alarms.Event) { evs = append(evs, e) })
	}
	rec := &record{dev: d, desc: &desc, session: &store.Session{Device: d.id, StartMS: nowMS, Remote: s.remote, Mode: desc.Mode}}
	g.alarmEffects(d, evs, rec)
	d.mu.Unlock()
	g.m.connected.Inc()

	// A barrier: the description and everything queued before are durable,
	// so the resume point below is what the store holds.
	if err := g.w.sync(ctx, rec); err != nil {
		if c := context.Cause(ctx); c != nil {
			return c // endStatus says why
		}
		if store.IsFull(err) {
			return status.Errorf(codes.ResourceExhausted, "store full: %v; back off and reconnect", err)
		}
		return status.Errorf(codes.Unavailable, "store write failed: %v; back off and reconnect", err)
	}
	d.mu.Lock()
	d.desc.Index = rec.desc.Index // assigned by the store on the device's first write
	resume := d.durableSeq
	d.rewindToDurable() // anything not durable is resent by the device
	s.epoch = d.epoch.Load()
	d.mu.Unlock()
	s.id = d.id + "-" + strconv.FormatInt(nowMS, 36)
	s.send(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Welcome{Welcome: &pb.Welcome{
		ResumeAfterSequence: resume, GatewayTimeUnixMs: nowMS, SessionId: s.id, Calibration: s.calRef,
		Notice:       caution.Text,
		Capabilities: negotiateCapabilities(in.GetCapabilities()),
	}}})
	if g.opt.CaptureRaw && s.mode == pb.Mode_MODE_RAW {
		s.send(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Config{Config: &pb.ConfigPush{RawCapture: true}}})
	}
	g.publishDevice(d, "connected")
	g.log.Info("device connected", "device", d.id, "mode", desc.Mode, "remote", s.remote, "resume_after", resume)
	return nil
}

var errReplaced = errors.New("replaced by a newer stream of the same device")

// loop receives and processes data messages until the stream ends.
func (s *stream) loop(ctx context.Context) error {
	for {
		m, err := s.recv(ctx)
		if err != nil {
			return err // endStatus maps it
		}
		if err := s.handle(ctx, m); err != nil {
			return err
		}
	}
}

// handle processes one message; an error ends the stream.
func (s *stream) handle(ctx context.Context, m *pb.ConnectRequest) error {
	g := s.g
	nowMS := g.nowMS()
	callHandleHook(m)
	if s.rateLimited(m, nowMS) {
		return nil
	}
	if n := proto.Size(m); n > g.opt.MaxMessageBytes {
		s.countReject()
		s.rejectMsg(reject(seqOf(m), pb.RejectReason_REJECT_REASON_TOO_LARGE, "message", "%d bytes, want at most %d", n, g.opt.MaxMessageBytes))
		return nil
	}
	switch k := m.Kind.(type) {
	case *pb.ConnectRequest_Introduction:
		s.countReject()
		s.rejectMsg(reject(0, pb.RejectReason_REJECT_REASON_NOT_INTRODUCED, "introduction", "already introduced as %s; open a new stream to change it", s.dev.id))
	case *pb.ConnectRequest_Status:
		if r := validateStatus(k.Status); r != nil {
			s.countReject()
			s.rejectMsg(r)
			return nil
		}
		s.dev.mu.Lock()
		s.dev.desc.BatteryPct = k.Status.GetBatteryPct()
		s.dev.mu.Unlock()
	case *pb.ConnectRequest_Summary:
		if s.mode != pb.Mode_MODE_SUMMARY {
			s.countReject()
			s.rejectMsg(reject(k.Summary.GetSequence(), pb.RejectReason_REJECT_REASON_WRONG_MODE, "summary", "device introduced itself in raw mode"))
			return nil
		}
		if r := validateSummary(k.Summary); r != nil {
			s.countReject()
			s.rejectMsg(r)
			return nil
		}
		return s.accept(ctx, k.Summary.GetSequence(), "summary.device_time_unix_ms", k.Summary.GetDeviceTimeUnixMs(), 0, 0, nowMS, func(rec *record) {
			sm := k.Summary
			p := store.Point{Device: s.dev.id, TimeMS: sm.GetDeviceTimeUnixMs(), SpO2: val(sm.Spo2Pct), Pulse: val(sm.PulseBpm),
				PI: val(sm.PiPct), SQI: val(sm.Quality), Ratio: math.NaN(), Source: uint8(pb.Source_SOURCE_DEVICE)}
			rec.points = append(rec.points, p)
		})
	case *pb.ConnectRequest_RawChunk:
		c := k.RawChunk
		if s.mode != pb.Mode_MODE_RAW {
			s.countReject()
			s.rejectMsg(reject(c.GetSequence(), pb.RejectReason_REJECT_REASON_WRONG_MODE, "raw_chunk", "device introduced itself in summary mode"))
			return nil
		}
		if r := validateRaw(c, s.adc, g.opt.MaxChunkSamples); r != nil {
			s.countReject()
			s.rejectMsg(r)
			return nil
		}
		spanMS := int64(float64(len(c.GetRed())) * 1000 / c.GetSampleRateHz())
		return s.accept(ctx, c.GetSequence(), "raw_chunk.device_time_unix_ms", c.GetDeviceTimeUnixMs(), uint32(len(c.GetRed())), spanMS, nowMS, func(rec *record) {
			s.estimate(c, rec)
			if g.opt.CaptureRaw {
				rec.raw = &store.RawCapture{Device: s.dev.id, Seq: c.GetSequence(), DeviceTimeMS: c.GetDeviceTimeUnixMs(),
					RateHz: c.GetSampleRateHz(), Red: c.GetRed(), IR: c.GetIr(), Ambient: c.GetAmbient()}
			}
		})
	default:
		s.countReject()
		s.rejectMsg(invalid(0, "kind", "empty message, want introduction, raw_chunk, summary or status"))
	}
	return nil
}

func val(p *float64) float64 {
	if p == nil {
		return math.NaN()
	}
	return *p
}

func (s *stream) countReject() {
	s.dev.mu.Lock()
	s.dev.cur.Rejected++
	s.dev.mu.Unlock()
}

// accept applies the sequence rules and the device time policy (clock.go)
// to a valid data message, lets fill add its effects, runs the alarm engine
// over new points, and queues the record. field names the message's device
// time; spanMS is the device time it covers (raw chunks).
func (s *stream) accept(ctx context.Context, seq uint64, field string, devMS int64, samples uint32, spanMS, nowMS int64, fill func(*record)) error {
	g, d := s.g, s.dev
	d.mu.Lock()
	if d.stream != s || d.epoch.Load() != s.epoch {
		// A batch with this device's data failed (or a newer stream took
		// over): nothing more is accepted on this stream.
		d.mu.Unlock()
		if c := context.Cause(ctx); c != nil {
			return c
		}
		return errReplaced
	}
	last := d.cur.LastSeq
	if seq <= last {
		d.cur.Duplicates++
		d.mu.Unlock()
		g.m.duplicates.Inc()
		s.rejectMsg(reject(seq, pb.RejectReason_REJECT_REASON_STALE_SEQUENCE, "sequence",
			"%d is not above %d, the last accepted; it is already held (never stored twice)", seq, last))
		return nil
	}
	var evs []alarms.Event
	collect := func(e alarms.Event) { evs = append(evs, e) }
	rej, late := d.admitTime(seq, field, devMS, samples, spanMS, nowMS, g.opt.LateAfter, collect)
	if rej != nil {
		// Refused for its device time: nothing of it is stored or
		// evaluated; the clock fault it raised is.
		d.cur.Rejected++
		rec := &record{dev: d}
		g.alarmEffects(d, evs, rec)
		d.mu.Unlock()
		s.rejectMsg(rej)
		if rec.alarm != nil || len(rec.episodes) > 0 {
			if err := g.w.submit(ctx, rec); err != nil {
				return status.Errorf(codes.Unavailable, "store: %v", err)
			}
		}
		return nil
	}
	gap := seq - last - 1
	if last == 0 && d.durableSeq == 0 && d.cur.Chunks == 0 {
		gap = 0 // a device's first message may start anywhere
	}
	d.cur.Lost += gap
	d.cur.LastSeq = seq
	d.cur.Chunks++
	d.cur.Samples += uint64(samples)
	d.cur.LastSeenMS = nowMS
	// Quality accounting (admitTime): clock drift, effective rate, and
	// lateness against the least-delayed recent messages (immune to resent
	// backlogs).
	if late {
		d.cur.Late++
	}
	d.mu.Unlock()
	if gap > 0 {
		g.m.lost.Add(float64(gap))
	}
	if late {
		g.m.late.Inc()
	}

	rec := &record{dev: d, stream: s, seq: seq, epoch: s.epoch, received: time.UnixMilli(nowMS),
		chunk: &store.Chunk{Device: d.id, Seq: seq, DeviceTimeMS: devMS, ArrivalMS: nowMS, Samples: samples}}
	if gap > 0 && s.tl != nil {
		s.tl.Gap() // samples are missing: the estimator must not bridge them
	}
	fill(rec)

	d.mu.Lock()
	for i := range rec.points {
		p := &rec.points[i]
		d.q.addPoint(p)
		d.evalPoint(p, collect)
	}
	if n := len(rec.points); n > 0 {
		d.latest = pointProto(&rec.points[n-1])
	}
	g.alarmEffects(d, evs, rec)
	rec.cursor = d.cur
	d.mu.Unlock()

	mode := "raw"
	if samples == 0 {
		mode = "summary"
	}
	g.m.messages.WithLabelValues(mode).Inc()
	g.m.samples.Add(float64(samples))
	for i := range rec.points {
		g.m.trendPoints.WithLabelValues(sourceLabel(rec.points[i].Source)).Inc()
		if g.hub.hasWatchers() {
			g.hub.publish(d.id, &pb.WatchEventsResponse{Event: &pb.WatchEventsResponse_TrendPoint{TrendPoint: pointProto(&rec.points[i])}})
		}
	}
	if err := g.w.submit(ctx, rec); err != nil {
		if c := context.Cause(ctx); c != nil {
			return c
		}
		return status.Errorf(codes.Unavailable, "store: %v", err)
	}
	return nil
}

func sourceLabel(s uint8) string {
	if s == uint8(pb.Source_SOURCE_DEVICE) {
		return "device"
	}
	return "gateway"
}

// estimate runs the estimator over a raw chunk and adds one trend point per
// completed second to rec. The timeline restarts the estimator on a new
// rate, a device-time jump of more than a second, or a gap (accept).
func (s *stream) estimate(c *pb.RawChunk, rec *record) {
	g := s.g
	if s.tl == nil {
		tl, err := estimator.NewTimeline(estimator.Config{ADCBits: int(s.adc), Calibration: s.cal})
		if err != nil {
			g.log.Warn("estimator", "device", s.dev.id, "err", err)
			return
		}
		s.tl = tl
	}
	var err error
	s.estOut, err = s.tl.PushCodes(c.GetDeviceTimeUnixMs(), c.GetSampleRateHz(), c.GetRed(), c.GetIr(), c.GetAmbient(), s.estOut[:0])
	if err != nil {
		g.log.Warn("estimator", "device", s.dev.id, "err", err)
		return
	}
	for _, e := range s.estOut {
		p := store.Point{Device: s.dev.id, TimeMS: e.TimeMS, SpO2: e.SpO2Pct, Pulse: e.PulseBPM,
			PI: e.PIPct, SQI: e.SQI, Ratio: e.Ratio, Flags: uint16(e.Flags), Source: uint8(pb.Source_SOURCE_GATEWAY)}
		rec.points = append(rec.points, p)
		if math.IsNaN(e.SpO2Pct) {
			g.m.estimatorSeconds.WithLabelValues("withheld").Inc()
		} else {
			g.m.estimatorSeconds.WithLabelValues("valid").Inc()
		}
		for _, f := range flagNames {
			if e.Flags.Has(f.flag) {
				g.m.estimatorFlags.WithLabelValues(f.name).Inc()
			}
		}
	}
}

var flagNames = []struct {
	flag estimator.Flags
	name string
}{{estimator.FlagNoPulse, "no_pulse"}, {estimator.FlagSensorOff, "sensor_off"}, {estimator.FlagClipping, "clipping"},
	{estimator.FlagMotion, "motion"}, {estimator.FlagLowResolution, "low_resolution"}}

// finish ends the session: the device goes offline for its alarm engine and
// the session's end is stored.
func (s *stream) finish(ctx context.Context) {
	g, d := s.g, s.dev
	nowMS := g.nowMS()
	d.mu.Lock()
	replaced := d.stream != s
	if !replaced {
		d.stream = nil
	}
	var evs []alarms.Event
	if !replaced && d.engine != nil {
		d.engine.SetOffline(true, d.techNowS(nowMS), func(e alarms.Event) { evs = append(evs, e) })
	}
	reason := "closed"
	if c := context.Cause(ctx); c != nil && !errors.Is(c, context.Canceled) {
		reason = c.Error()
	}
	if v := d.q.driftPPM(); !math.IsNaN(v) {
		d.desc.DriftPPM = v // quality accounting: the last drift estimate outlives restarts
	}
	desc := d.desc
	desc.LastSeenMS = nowMS
	rec := &record{dev: d, desc: &desc, session: &store.Session{Device: d.id, StartMS: d.sessionMS, EndMS: nowMS, Remote: s.remote, Reason: reason, Mode: desc.Mode}}
	g.alarmEffects(d, evs, rec)
	d.mu.Unlock()
	g.m.connected.Dec()
	g.m.streams.WithLabelValues(map[bool]string{true: "replaced", false: "ended"}[replaced]).Inc()
	// Best effort: the writer may be closing during shutdown, in which case
	// the session stays open in the store and is closed at the next start.
	_ = g.w.submit(context.WithoutCancel(ctx), rec)
	if !replaced {
		g.publishDevice(d, "disconnected")
	}
	s.outMu.Lock()
	drops := s.drops
	s.outMu.Unlock()
	g.log.Info("device disconnected", "device", d.id, "reason", reason, "dropped_sends", drops)
}

func (g *Gateway) nowMS() int64 { return g.opt.Now().UnixMilli() }
