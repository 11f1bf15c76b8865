package ingest

import (
	"context"
	"errors"
	"math"
	"runtime/debug"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/caution"

	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Limits on a stream.
const (
	introTimeout = 30 * time.Second
	// MaxRejectsBeforeIntro: a stream that sent this many messages without a
	// valid introduction is ended.
	MaxRejectsBeforeIntro = 100
	sendQueue             = 64
	// DefaultSendStall: a stream whose device has not taken an answer for
	// this long (one Send blocked: the transport's buffers for it, about
	// 128 KiB, are full because the device does not read) is ended
	// (Config.SendStall; tests shorten it). Tick checks every second, so it
	// ends within that plus a second.
	DefaultSendStall = 20 * time.Second
	// senderDrain bounds how long an ending stream waits for its sender to
	// deliver the answers and ack already due; the device id is free for a
	// new stream before that wait.
	senderDrain = 2 * time.Second
)

// stream is one open Connect call of one device.
type stream struct {
	p      *Pipeline
	dev    *device
	conn   Conn
	ctx    context.Context // the handler's; cancelled with a cause
	cancel context.CancelCauseFunc
	ended  chan struct{} // closed when the handler has returned
	remote string
	id     string

	epoch    uint64 // the device's write epoch this stream feeds (set when attached)
	attached bool   // start made it the device's stream: finish must run
	release  func() // gives back the device's fence (fleet on etcd: fence.go)

	acked   atomic.Uint64 // durable through this sequence (set by the writer)
	msgs    chan *pb.ConnectRequest
	recvErr chan error
	// Output: the handler queues answers and the writer raises acked; the
	// sender goroutine sends, so no Send blocks the handler. Bounded: with
	// sendQueue answers waiting, the handler waits for room (send).
	outMu        sync.Mutex
	outq         []*pb.ConnectResponse
	waits        uint64        // times the handler waited for room
	room         chan struct{} // cap 1: the sender took the queue
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
	// live: the curve of a raw stream that did not ask for a calibration
	// (the one assigned to the device or its model), swapped by
	// Recalibrate; nil for other streams.
	live   *liveCal
	calGen uint64      // Pipeline.calGen when the stream's calibration was resolved
	bucket tokenBucket // message-rate limit (ratelimit.go)
	span   tokenBucket // device-time rate limit, in device seconds (ratelimit.go)

	// raw pipeline (owned by the handler goroutine)
	tl       *estimator.Timeline // nil until the first raw chunk
	estOut   []estimator.TimedEstimate
	anchor   *estimator.Anchor // the device's, for a calibration on the anchored ratio (anchor.go)
	spo2Note string            // why SpO2 is withheld, from the anchor
}

// Conn is a device's stream as the pipeline uses it: the gateway's
// IngestService.Connect stream satisfies it.
type Conn interface {
	Send(*pb.ConnectResponse) error
	Recv() (*pb.ConnectRequest, error)
}

// HandleStream serves one device stream (an IngestService.Connect call)
// until it ends, and returns what ended it: err is the handler's own
// reason (nil or io.EOF when the device closed its side; one of this
// package's errors; the transport's error; Config.Authorize's error as it
// is), cause the reason the stream was cancelled from outside the handler
// (nil when it was not: ErrReplaced, *StoreFault, ErrSendStalled, the
// parent context's cause, or EndStreams's). A recovered panic gives an
// *Error of Kind Internal and no cause. remote is the device's address.
func (p *Pipeline) HandleStream(parent context.Context, conn Conn, remote string) (err, cause error) {
	ctx, cancel := context.WithCancelCause(parent)
	defer cancel(nil)
	s := &stream{p: p, conn: conn, ctx: ctx, cancel: cancel, ended: make(chan struct{}), remote: remote,
		wake: make(chan struct{}, 1), room: make(chan struct{}, 1), closing: make(chan struct{}), senderDone: make(chan struct{}),
		msgs: make(chan *pb.ConnectRequest), recvErr: make(chan error, 1)}
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
		if v := recover(); v != nil {
			p.m.panics.Inc()
			p.log.Error("panic in device stream", "device", s.devID(), "panic", v, "stack", string(debug.Stack()))
			err, cause = errorf(Internal, "internal error in this stream (recovered; the gateway goes on)"), nil
		}
	}()
	defer func() {
		if s.attached {
			s.finish(ctx)
		}
	}()

	if err := s.introduce(ctx); err != nil {
		return err, context.Cause(ctx)
	}
	err = s.loop(ctx)
	return err, context.Cause(ctx)
}

func (s *stream) devID() string {
	if s.dev == nil {
		return ""
	}
	return s.dev.id
}

// introduce waits for a valid introduction, rejecting anything else.
func (s *stream) introduce(ctx context.Context) error {
	p := s.p
	timer := time.AfterFunc(introTimeout, func() { s.cancel(errNoIntroduction) })
	defer timer.Stop()
	rejects := 0
	for {
		m, err := s.recv(ctx)
		if err != nil {
			if context.Cause(ctx) == errNoIntroduction {
				return errorf(TimedOut, "introduction: none within %v of connecting", introTimeout)
			}
			return err
		}
		in := m.GetIntroduction()
		var rej *pb.Rejection
		switch {
		case in == nil:
			rej = reject(seqOf(m), pb.RejectReason_REJECT_REASON_NOT_INTRODUCED, "introduction", "the first message must be an introduction")
		case proto.Size(m) > p.cfg.MaxMessageBytes:
			rej = reject(0, pb.RejectReason_REJECT_REASON_TOO_LARGE, "introduction", "%d bytes, want at most %d", proto.Size(m), p.cfg.MaxMessageBytes)
		default:
			rej = validateIntroduction(in)
		}
		if rej == nil {
			if err := p.cfg.Authorize(ctx, in.GetDeviceId()); err != nil {
				return err
			}
			return s.start(ctx, in)
		}
		s.rejectMsg(rej)
		if rejects++; rejects >= MaxRejectsBeforeIntro {
			return errorf(Invalid, "introduction: %d messages without a valid introduction; last: %s: %s", rejects, rej.Field, rej.Detail)
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
	p := s.p
	if addr := p.cfg.Owner(in.GetDeviceId()); addr != "" {
		s.send(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Redirect{Redirect: &pb.Redirect{Address: addr, Detail: "device " + in.GetDeviceId() + " belongs to the gateway at " + addr}}})
		return errorf(Precondition, "device %s belongs to the gateway at %s", in.GetDeviceId(), addr)
	}
	d, _ := p.devices.getOrCreate(in.GetDeviceId())
	s.dev = d
	s.mode, s.adc, s.redNM, s.irNM = in.GetMode(), in.GetAdcBits(), in.GetRedWavelengthNm(), in.GetIrWavelengthNm()
	if err := s.replaceOlder(ctx); err != nil {
		return err
	}
	if s.mode == pb.Mode_MODE_RAW {
		s.calGen = p.calGen.Load() // before the assignments are read (catchUpCalibration)
		cal, ref, err := p.cfg.Calibration(d.id, in.GetModel(), in.GetCalibrationId(), s.redNM, s.irNM)
		if err != nil {
			s.rejectMsg(invalid(0, "introduction.calibration_id", "%v", err))
			return errorf(Invalid, "introduction.calibration_id: %v", err)
		}
		s.cal, s.calRef = cal, ref
		// A curve on the anchored ratio is not swapped on an open stream: a
		// changed assignment needs a new anchor, so it is in force from the
		// device's next connection (Recalibrate).
		if in.GetCalibrationId() == "" && !anchored(cal) {
			s.live = newLiveCal(cal)
			s.cal = s.live
		}
	}
	if err := s.adoptAnchor(p.nowMS()); err != nil {
		s.rejectMsg(invalid(0, "introduction.calibration_id", "%v", err))
		return errorf(Invalid, "introduction.calibration_id: %v", err)
	}

	if err := s.fence(ctx); err != nil {
		return err
	}
	s.adoptSharedAlarm(ctx)
	nowMS := p.nowMS()
	rec := s.attach(in, nowMS)
	p.m.connected.Inc()
	// A barrier: the description and everything queued before are durable,
	// so the resume point below is what the store holds.
	if err := p.w.sync(ctx, rec); err != nil {
		if c := context.Cause(ctx); c != nil {
			return c // the caller tells why
		}
		if store.IsFull(err) {
			return errorf(StoreFull, "store full: %v; back off and reconnect", err)
		}
		return errorf(Unavailable, "store write failed: %v; back off and reconnect", err)
	}
	d.mu.Lock()
	d.desc.Index = rec.desc.Index // assigned by the store on the device's first write
	resume, mode := d.durableSeq, d.desc.Mode
	d.rewindToDurable() // anything not durable is resent by the device
	s.epoch = d.epoch.Load()
	adopted := p.adoptedEpisodes(d) // needs the index
	d.mu.Unlock()
	if len(adopted) > 0 {
		if err := p.w.submit(ctx, &record{episodes: adopted}); err != nil {
			p.log.Warn("adopted episodes not stored here; they are with their end", "device", d.id, "err", err)
		}
	}
	s.id = d.id + "-" + strconv.FormatInt(nowMS, 36)
	s.send(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Welcome{Welcome: &pb.Welcome{
		ResumeAfterSequence: resume, GatewayTimeUnixMs: nowMS, SessionId: s.id, Calibration: s.calRef,
		Notice:       caution.Text,
		Capabilities: negotiateCapabilities(in.GetCapabilities()),
	}}})
	if p.cfg.CaptureRaw && s.mode == pb.Mode_MODE_RAW {
		s.send(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Config{Config: &pb.ConfigPush{RawCapture: true}}})
	}
	p.publishDevice(d, "connected")
	p.log.Info("device connected", "device", d.id, "mode", mode, "remote", s.remote, "resume_after", resume)
	return nil
}

// replaceOlder ends an older stream of the same device, if one is open, and
// waits until its handler has returned, so only one stream ever feeds the
// device.
func (s *stream) replaceOlder(ctx context.Context) error {
	p, d := s.p, s.dev
	d.mu.Lock()
	old := d.stream
	d.mu.Unlock()
	if old == nil {
		return nil
	}
	// The old handler only waits on channels (its reader and sender own
	// the blocking calls), so it ends within milliseconds even when its
	// device neither sends nor reads.
	old.cancel(ErrReplaced)
	t := time.NewTimer(10 * time.Second)
	select {
	case <-old.ended:
		t.Stop()
	case <-ctx.Done():
		t.Stop()
		return context.Cause(ctx)
	case <-t.C:
		return errorf(Unavailable, "device %s: the previous stream did not end; retry", d.id)
	}
	p.m.replaced.Inc()
	p.Audit(ctx, "device:"+d.id, "stream.replace", d.id, "a new stream replaced the open one from "+old.remote, s.remote)
	return nil
}

// attach makes the stream its device's, starts a session and brings the
// device back online for its alarm engine; it returns the record that
// stores the description and the session. From here on, finish undoes it
// whatever happens.
func (s *stream) attach(in *pb.Introduction, nowMS int64) *record {
	p, d := s.p, s.dev
	d.mu.Lock()
	defer d.mu.Unlock()
	d.stream = s
	s.attached = true
	s.epoch = d.epoch.Load()
	d.desc.Model, d.desc.Firmware, d.introLabels = in.GetModel(), in.GetFirmware(), in.GetLabels()
	d.desc.Labels = p.labels.merged(d.id, d.introLabels)
	d.desc.Mode = map[pb.Mode]string{pb.Mode_MODE_RAW: "raw", pb.Mode_MODE_SUMMARY: "summary"}[s.mode]
	s.catchUpCalibration(in.GetModel())
	d.desc.RedNM, d.desc.IRNM, d.desc.ADCBits, d.desc.Calibration = s.redNM, s.irNM, s.adc, s.calRef
	if d.desc.FirstSeenMS == 0 {
		d.desc.FirstSeenMS = nowMS
	}
	d.desc.LastSeenMS = nowMS
	d.q.startSession() // quality accounting
	d.desc.Sessions++
	d.sessionMS = nowMS
	p.ensureEngine(d)
	p.backHere(d)
	desc := d.desc
	var evs []alarms.Event
	if d.engine != nil && d.engine.Offline() {
		d.engine.SetOffline(false, d.techNowS(nowMS), func(e alarms.Event) { evs = append(evs, e) })
	}
	rec := &record{dev: d, desc: &desc, session: &store.Session{Device: d.id, StartMS: nowMS, Remote: s.remote, Mode: desc.Mode}}
	p.alarmEffects(d, evs, rec)
	return rec
}

// finish ends the session: the device goes offline for its alarm engine and
// the session's end is stored.
func (s *stream) finish(ctx context.Context) {
	p, d := s.p, s.dev
	defer s.unfence()
	moved := s.movedAway(ctx)
	nowMS := p.nowMS()
	d.mu.Lock()
	replaced := d.stream != s
	if !replaced {
		d.stream = nil
		d.anchorLeftMS = nowMS // a reconnect within AnchorKeepS keeps the anchor (anchor.go)
	}
	var evs []alarms.Event
	if !replaced && !moved && d.engine != nil {
		d.engine.SetOffline(true, d.techNowS(nowMS), func(e alarms.Event) { evs = append(evs, e) })
	}
	if !replaced && moved {
		p.markMoved(d, movedTo(ctx), nowMS)
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
	p.alarmEffects(d, evs, rec)
	d.mu.Unlock()
	p.m.connected.Dec()
	p.m.streams.WithLabelValues(map[bool]string{true: "replaced", false: "ended"}[replaced]).Inc()
	// Best effort: the writer may be closing during shutdown, in which case
	// the session stays open in the store and is closed at the next start.
	_ = p.w.submit(context.WithoutCancel(ctx), rec)
	if !replaced {
		p.publishDevice(d, "disconnected")
	}
	s.outMu.Lock()
	waits := s.waits
	s.outMu.Unlock()
	p.log.Info("device disconnected", "device", d.id, "reason", reason, "waits_for_reader", waits)
}
