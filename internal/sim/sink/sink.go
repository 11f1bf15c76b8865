// Package sink is a bare gRPC peer for simulated devices: it implements
// pulsefleet.v1.IngestService, answers each introduction with a Welcome
// naming the highest sequence number it accepted for the device, decodes and
// checks each data message against the bounds of the API, acknowledges what
// it accepted and rejects stale sequence numbers, and stores nothing.
//
// It is the baseline of the bench command (the same load against the sink
// and against the full gateway) and the peer the simulator's tests run
// against. "Durable" here means "accepted into memory".
package sink

import (
	"errors"
	"fmt"
	"io"
	"math"
	"net"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"

	pulsefleetv1 "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Options tune the sink. The zero value is a plain sink.
type Options struct {
	// DurableLag makes the sink hold back its acknowledgements and its
	// Welcome by this many accepted messages per device, as a store that
	// has accepted a message but not yet made it durable would; resent
	// messages in that window are then rejected as stale. 0 = acknowledge
	// everything accepted at once. For tests of device resend logic.
	DurableLag uint64
	// RedirectTo, when set, answers every introduction with a Redirect to
	// this address instead of a Welcome. For tests of redirect handling.
	RedirectTo string
	// Authorize, when set, is asked about every stream with the device id
	// and the bearer token from the "authorization" metadata ("" when
	// absent); an error ends the stream as UNAUTHENTICATED.
	Authorize func(deviceID, token string) error
	// EndStreamEvery, when set, ends a stream (UNAVAILABLE) after it has
	// accepted this many messages, before acknowledging the last, as a
	// gateway does when a store write fails; the device's sends in flight
	// then fail. For tests of device resend and counting. 0 = never.
	EndStreamEvery uint64
}

// Server is the sink. Safe for concurrent use.
type Server struct {
	pulsefleetv1.UnimplementedIngestServiceServer
	opts Options

	mu      sync.Mutex
	devices map[string]*device

	sessions atomic.Uint64
	messages atomic.Uint64
	accepted atomic.Uint64
	samples  atomic.Uint64
	rejected atomic.Uint64
	stale    atomic.Uint64
	statuses atomic.Uint64
}

type device struct {
	mu       sync.Mutex
	last     uint64 // highest accepted sequence number
	accepted uint64
	samples  uint64
	stale    uint64
	rejected uint64
	sessions uint64
}

// New returns a sink.
func New(opts Options) *Server {
	return &Server{opts: opts, devices: map[string]*device{}}
}

// DeviceStats are one device's counts.
type DeviceStats struct {
	LastSequence uint64 // highest accepted sequence number
	Accepted     uint64 // data messages accepted (each sequence number once)
	Samples      uint64 // samples in accepted raw chunks, plus one per accepted summary
	Stale        uint64 // messages rejected as stale (already held)
	Rejected     uint64 // messages rejected for any other reason
	Sessions     uint64 // streams opened
}

// Stats are the sink's totals.
type Stats struct {
	Devices  int
	Sessions uint64
	Messages uint64 // every message received, introductions and status included
	Accepted uint64
	Samples  uint64
	Rejected uint64
	Stale    uint64
	Statuses uint64
}

// Stats returns the totals so far.
func (s *Server) Stats() Stats {
	s.mu.Lock()
	n := len(s.devices)
	s.mu.Unlock()
	return Stats{Devices: n, Sessions: s.sessions.Load(), Messages: s.messages.Load(),
		Accepted: s.accepted.Load(), Samples: s.samples.Load(), Rejected: s.rejected.Load(),
		Stale: s.stale.Load(), Statuses: s.statuses.Load()}
}

// Device returns one device's counts.
func (s *Server) Device(id string) (DeviceStats, bool) {
	s.mu.Lock()
	d, ok := s.devices[id]
	s.mu.Unlock()
	if !ok {
		return DeviceStats{}, false
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	return DeviceStats{LastSequence: d.last, Accepted: d.accepted, Samples: d.samples,
		Stale: d.stale, Rejected: d.rejected, Sessions: d.sessions}, true
}

// DeviceIDs lists the devices seen, sorted.
func (s *Server) DeviceIDs() []string {
	s.mu.Lock()
	defer s.mu.Unlock()
	ids := make([]string, 0, len(s.devices))
	for id := range s.devices {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	return ids
}

func (s *Server) device(id string) *device {
	s.mu.Lock()
	defer s.mu.Unlock()
	d, ok := s.devices[id]
	if !ok {
		d = &device{}
		s.devices[id] = d
	}
	return d
}

var idRE = regexp.MustCompile(`^[A-Za-z0-9._-]{1,64}$`)

var sessionSeq atomic.Uint64

// introduce reads up to the stream's introduction, rejecting any message
// before it, and checks it: device id, converter bits, mode, and the token
// when Options.Authorize is set.
func (s *Server) introduce(stream grpc.BidiStreamingServer[pulsefleetv1.ConnectRequest, pulsefleetv1.ConnectResponse]) (*pulsefleetv1.Introduction, error) {
	var intro *pulsefleetv1.Introduction
	for intro == nil {
		m, err := stream.Recv()
		if err != nil {
			return nil, recvErr(err)
		}
		s.messages.Add(1)
		if intro = m.GetIntroduction(); intro == nil {
			s.rejected.Add(1)
			if err := stream.Send(reject(seqOf(m), pulsefleetv1.RejectReason_REJECT_REASON_NOT_INTRODUCED, "introduction", "the first message must be an introduction")); err != nil {
				return nil, err
			}
		}
	}
	if !idRE.MatchString(intro.GetDeviceId()) {
		return nil, status.Errorf(codes.InvalidArgument, "introduction.device_id: %q, want 1..64 characters of [A-Za-z0-9._-]", intro.GetDeviceId())
	}
	bits := intro.GetAdcBits()
	if bits < 8 || bits > 24 {
		return nil, status.Errorf(codes.InvalidArgument, "introduction.adc_bits: %d, want 8..24", bits)
	}
	mode := intro.GetMode()
	if mode != pulsefleetv1.Mode_MODE_RAW && mode != pulsefleetv1.Mode_MODE_SUMMARY {
		return nil, status.Errorf(codes.InvalidArgument, "introduction.mode: %v, want MODE_RAW or MODE_SUMMARY", mode)
	}
	if s.opts.Authorize != nil {
		tok := ""
		if md, ok := metadata.FromIncomingContext(stream.Context()); ok {
			if v := md.Get("authorization"); len(v) > 0 {
				tok = strings.TrimPrefix(v[0], "Bearer ")
			}
		}
		if err := s.opts.Authorize(intro.GetDeviceId(), tok); err != nil {
			return nil, status.Errorf(codes.Unauthenticated, "device %s: %v", intro.GetDeviceId(), err)
		}
	}
	return intro, nil
}

// classify returns a data message's sequence number and sample count, and
// the rejection it earns before any sequence check (wrong mode, an invalid
// field, a second introduction, an empty message, sequence 0); isStatus says
// m is a status report, which is only counted.
func classify(m *pulsefleetv1.ConnectRequest, mode pulsefleetv1.Mode, top uint32) (seq uint64, n int, rej *pulsefleetv1.ConnectResponse, isStatus bool) {
	switch k := m.Kind.(type) {
	case *pulsefleetv1.ConnectRequest_RawChunk:
		seq, n = k.RawChunk.GetSequence(), len(k.RawChunk.GetRed())
		if mode != pulsefleetv1.Mode_MODE_RAW {
			rej = reject(seq, pulsefleetv1.RejectReason_REJECT_REASON_WRONG_MODE, "raw_chunk", "device introduced summary mode")
		} else if field, detail := checkRaw(k.RawChunk, top); field != "" {
			rej = reject(seq, pulsefleetv1.RejectReason_REJECT_REASON_INVALID_FIELD, field, detail)
		}
	case *pulsefleetv1.ConnectRequest_Summary:
		seq, n = k.Summary.GetSequence(), 1
		if mode != pulsefleetv1.Mode_MODE_SUMMARY {
			rej = reject(seq, pulsefleetv1.RejectReason_REJECT_REASON_WRONG_MODE, "summary", "device introduced raw mode")
		} else if field, detail := checkSummary(k.Summary); field != "" {
			rej = reject(seq, pulsefleetv1.RejectReason_REJECT_REASON_INVALID_FIELD, field, detail)
		}
	case *pulsefleetv1.ConnectRequest_Status:
		return 0, 0, nil, true
	case *pulsefleetv1.ConnectRequest_Introduction:
		rej = reject(0, pulsefleetv1.RejectReason_REJECT_REASON_NOT_INTRODUCED, "introduction", "second introduction on one stream")
	default:
		rej = reject(0, pulsefleetv1.RejectReason_REJECT_REASON_UNSPECIFIED, "kind", "empty message")
	}
	if rej == nil && seq == 0 {
		rej = reject(0, pulsefleetv1.RejectReason_REJECT_REASON_INVALID_FIELD, "sequence", "0, want 1 or more")
	}
	return seq, n, rej, false
}

// Connect serves one device stream.
func (s *Server) Connect(stream grpc.BidiStreamingServer[pulsefleetv1.ConnectRequest, pulsefleetv1.ConnectResponse]) error {
	intro, err := s.introduce(stream)
	if err != nil {
		return err
	}
	bits, mode := intro.GetAdcBits(), intro.GetMode()
	if s.opts.RedirectTo != "" {
		return stream.Send(&pulsefleetv1.ConnectResponse{Kind: &pulsefleetv1.ConnectResponse_Redirect{Redirect: &pulsefleetv1.Redirect{
			Address: s.opts.RedirectTo, Detail: "this sink redirects every device"}}})
	}
	top := uint32(1)<<bits - 1
	d := s.device(intro.GetDeviceId())
	s.sessions.Add(1)
	d.mu.Lock()
	d.sessions++
	durable := s.durable(d)
	d.mu.Unlock()
	id := sessionSeq.Add(1)
	if err := stream.Send(&pulsefleetv1.ConnectResponse{Kind: &pulsefleetv1.ConnectResponse_Welcome{Welcome: &pulsefleetv1.Welcome{
		ResumeAfterSequence: durable,
		GatewayTimeUnixMs:   time.Now().UnixMilli(),
		SessionId:           "sink-" + strconv.FormatUint(id, 10),
		Notice:              "bare sink: nothing is stored",
	}}}); err != nil {
		return err
	}
	ack := &pulsefleetv1.Ack{}
	ackMsg := &pulsefleetv1.ConnectResponse{Kind: &pulsefleetv1.ConnectResponse_Ack{Ack: ack}}
	var acceptedHere uint64
	for {
		m, err := stream.Recv()
		if err != nil {
			return recvErr(err)
		}
		s.messages.Add(1)
		seq, n, rej, isStatus := classify(m, mode, top)
		if isStatus {
			s.statuses.Add(1)
			continue
		}
		d.mu.Lock()
		if rej == nil && seq <= d.last {
			d.stale++
			d.mu.Unlock()
			s.stale.Add(1)
			if err := stream.Send(reject(seq, pulsefleetv1.RejectReason_REJECT_REASON_STALE_SEQUENCE, "sequence",
				fmt.Sprintf("%d, already holding up to %d", seq, d.last))); err != nil {
				return err
			}
			continue
		}
		if rej != nil {
			d.rejected++
			d.mu.Unlock()
			s.rejected.Add(1)
			if err := stream.Send(rej); err != nil {
				return err
			}
			continue
		}
		d.last = seq
		d.accepted++
		d.samples += uint64(n)
		through := s.durable(d)
		d.mu.Unlock()
		s.accepted.Add(1)
		s.samples.Add(uint64(n))
		if acceptedHere++; s.opts.EndStreamEvery > 0 && acceptedHere >= s.opts.EndStreamEvery {
			return status.Errorf(codes.Unavailable, "sink: stream ended after %d accepted messages (EndStreamEvery)", acceptedHere)
		}
		if through == 0 {
			continue
		}
		ack.ThroughSequence = through
		if err := stream.Send(ackMsg); err != nil {
			return err
		}
	}
}

// durable is the highest sequence number the sink calls durable; d.mu held.
func (s *Server) durable(d *device) uint64 {
	if d.last <= s.opts.DurableLag {
		return 0
	}
	return d.last - s.opts.DurableLag
}

func recvErr(err error) error {
	if errors.Is(err, io.EOF) {
		return nil
	}
	return err
}

func seqOf(m *pulsefleetv1.ConnectRequest) uint64 {
	if r := m.GetRawChunk(); r != nil {
		return r.GetSequence()
	}
	return m.GetSummary().GetSequence()
}

func reject(seq uint64, reason pulsefleetv1.RejectReason, field, detail string) *pulsefleetv1.ConnectResponse {
	return &pulsefleetv1.ConnectResponse{Kind: &pulsefleetv1.ConnectResponse_Rejection{Rejection: &pulsefleetv1.Rejection{
		Sequence: seq, Reason: reason, Field: field, Detail: detail}}}
}

// checkRaw returns the first field out of its bound (ingest.proto), or "".
func checkRaw(c *pulsefleetv1.RawChunk, top uint32) (field, detail string) {
	n := len(c.GetRed())
	switch {
	case !(c.GetSampleRateHz() >= 25 && c.GetSampleRateHz() <= 1000):
		return "raw_chunk.sample_rate_hz", fmt.Sprintf("%v Hz, want 25..1000", c.GetSampleRateHz())
	case n < 1 || n > 1000:
		return "raw_chunk.red", fmt.Sprintf("%d samples, want 1..1000", n)
	case len(c.GetIr()) != n:
		return "raw_chunk.ir", fmt.Sprintf("%d samples, want %d (as red)", len(c.GetIr()), n)
	case len(c.GetAmbient()) != 0 && len(c.GetAmbient()) != n:
		return "raw_chunk.ambient", fmt.Sprintf("%d samples, want 0 or %d (as red)", len(c.GetAmbient()), n)
	case !(c.GetLedDriveMa() >= 0 && c.GetLedDriveMa() <= 255):
		return "raw_chunk.led_drive_ma", fmt.Sprintf("%v, want 0..255", c.GetLedDriveMa())
	case !(c.GetGain() >= 0 && c.GetGain() <= 1000):
		return "raw_chunk.gain", fmt.Sprintf("%v, want 0..1000", c.GetGain())
	}
	if f, d := checkCodes("raw_chunk.red", c.GetRed(), top); f != "" {
		return f, d
	}
	if f, d := checkCodes("raw_chunk.ir", c.GetIr(), top); f != "" {
		return f, d
	}
	return checkCodes("raw_chunk.ambient", c.GetAmbient(), top)
}

func checkCodes(name string, ch []uint32, top uint32) (field, detail string) {
	for i, v := range ch {
		if v > top {
			return name, fmt.Sprintf("sample %d is %d, want 0..%d", i, v, top)
		}
	}
	return "", ""
}

func checkSummary(m *pulsefleetv1.Summary) (field, detail string) {
	in := func(p *float64, lo, hi float64) bool { return p == nil || (*p >= lo && *p <= hi && !math.IsNaN(*p)) }
	switch {
	case !in(m.Spo2Pct, 0, 100):
		return "summary.spo2_pct", fmt.Sprintf("%v, want 0..100", m.GetSpo2Pct())
	case !in(m.PulseBpm, 0, 350):
		return "summary.pulse_bpm", fmt.Sprintf("%v, want 0..350", m.GetPulseBpm())
	case !in(m.PiPct, 0, 100):
		return "summary.pi_pct", fmt.Sprintf("%v, want 0..100", m.GetPiPct())
	case !in(m.Quality, 0, 1):
		return "summary.quality", fmt.Sprintf("%v, want 0..1", m.GetQuality())
	}
	return "", ""
}

// Running is a sink serving on a listener; Stop ends it.
type Running struct {
	*Server
	g    *grpc.Server
	addr string
	done chan error
}

// Start serves a new sink on lis until Stop. Extra server options are
// appended to the sink's (which lift the per-connection stream limit).
func Start(lis net.Listener, opts Options, extra ...grpc.ServerOption) *Running {
	so := append([]grpc.ServerOption{grpc.MaxConcurrentStreams(math.MaxUint32)}, extra...)
	r := &Running{Server: New(opts), g: grpc.NewServer(so...), addr: lis.Addr().String(), done: make(chan error, 1)}
	pulsefleetv1.RegisterIngestServiceServer(r.g, r.Server)
	go func() { r.done <- r.g.Serve(lis) }()
	return r
}

// Addr is the address the sink listens on.
func (r *Running) Addr() string { return r.addr }

// Stop stops gracefully, forcing open streams closed after grace.
func (r *Running) Stop(grace time.Duration) error {
	t := time.AfterFunc(grace, r.g.Stop)
	r.g.GracefulStop()
	t.Stop()
	err := <-r.done
	if errors.Is(err, grpc.ErrServerStopped) {
		err = nil
	}
	return err
}
