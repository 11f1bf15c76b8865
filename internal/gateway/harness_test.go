package gateway

import (
	"context"
	"io"
	"net"
	"net/http"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// harness runs a real gateway on loopback sockets over a real bbolt file.
type harness struct {
	t        testing.TB
	dir      string
	db       *store.DB
	g        *Gateway
	grpcAddr string
	httpAddr string
	cancel   context.CancelFunc
	done     chan error
	conn     *grpc.ClientConn
	mutate   func(*Options)
}

func newHarness(t testing.TB, mutate func(*Options)) *harness {
	h := &harness{t: t, dir: t.TempDir(), mutate: mutate}
	h.start()
	t.Cleanup(h.stop)
	return h
}

func (h *harness) start() {
	t := h.t
	t.Helper()
	db, err := store.Open(h.dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	opt := Options{Store: db, BatchDelay: 5 * time.Millisecond, WatchdogEvery: 50 * time.Millisecond}
	if h.mutate != nil {
		h.mutate(&opt)
	}
	g, err := New(opt)
	if err != nil {
		t.Fatal(err)
	}
	gl, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	hl, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	h.db, h.g, h.cancel, h.done = db, g, cancel, make(chan error, 1)
	h.grpcAddr, h.httpAddr = gl.Addr().String(), hl.Addr().String()
	go func() { h.done <- g.Serve(ctx, gl, hl) }()
	conn, err := grpc.NewClient(h.grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	h.conn = conn
	deadline := time.Now().Add(10 * time.Second)
	for !g.Ready() && time.Now().Before(deadline) {
		time.Sleep(5 * time.Millisecond)
	}
}

// stop shuts the gateway down gracefully and closes the store (idempotent).
func (h *harness) stop() {
	if h.cancel == nil {
		return
	}
	h.conn.Close()
	h.cancel()
	if err := <-h.done; err != nil {
		h.t.Errorf("serve: %v", err)
	}
	if err := h.db.Check(); err != nil {
		h.t.Errorf("store integrity: %v", err)
	}
	h.db.Close()
	h.cancel = nil
}

func (h *harness) restart() { h.stop(); h.start() }

func (h *harness) fleet() pb.FleetServiceClient { return pb.NewFleetServiceClient(h.conn) }

// testDevice is a hand-driven device stream.
type testDevice struct {
	t      testing.TB
	stream pb.IngestService_ConnectClient
	cancel context.CancelFunc
	mu     sync.Mutex
	acked  uint64
	rejs   []*pb.Rejection
	other  []*pb.ConnectResponse
	ch     chan struct{}
	ended  chan error
}

func (h *harness) open(t testing.TB) *testDevice {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	st, err := pb.NewIngestServiceClient(h.conn).Connect(ctx)
	if err != nil {
		t.Fatal(err)
	}
	d := &testDevice{t: t, stream: st, cancel: cancel, ch: make(chan struct{}, 1), ended: make(chan error, 1)}
	go d.read()
	t.Cleanup(d.close)
	return d
}

// connect opens a stream and introduces a device; it returns the welcome.
func (h *harness) connect(t testing.TB, in *pb.Introduction) (*testDevice, *pb.Welcome) {
	t.Helper()
	d := h.open(t)
	d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: in}})
	var w *pb.Welcome
	d.waitFor(func() bool {
		for _, m := range d.other {
			if w = m.GetWelcome(); w != nil {
				return true
			}
		}
		return false
	}, "welcome")
	return d, w
}

func (d *testDevice) read() {
	for {
		m, err := d.stream.Recv()
		if err != nil {
			d.ended <- err
			close(d.ch)
			return
		}
		d.mu.Lock()
		switch k := m.Kind.(type) {
		case *pb.ConnectResponse_Ack:
			d.acked = max(d.acked, k.Ack.GetThroughSequence())
		case *pb.ConnectResponse_Rejection:
			d.rejs = append(d.rejs, k.Rejection)
		default:
			d.other = append(d.other, m)
		}
		d.mu.Unlock()
		select {
		case d.ch <- struct{}{}:
		default:
		}
	}
}

func (d *testDevice) send(m *pb.ConnectRequest) {
	d.t.Helper()
	if err := d.stream.Send(m); err != nil {
		d.t.Fatalf("send: %v", err)
	}
}

// waitFor waits (bounded) until cond, evaluated under the device's lock, holds.
func (d *testDevice) waitFor(cond func() bool, what string) {
	d.t.Helper()
	deadline := time.After(20 * time.Second)
	for {
		d.mu.Lock()
		ok := cond()
		d.mu.Unlock()
		if ok {
			return
		}
		select {
		case _, open := <-d.ch:
			if !open {
				d.mu.Lock()
				ok := cond()
				d.mu.Unlock()
				if !ok {
					d.t.Fatalf("stream ended while waiting for %s", what)
				}
				return
			}
		case <-deadline:
			d.t.Fatalf("timed out waiting for %s", what)
		}
	}
}

func (d *testDevice) waitAck(seq uint64) {
	d.t.Helper()
	d.waitFor(func() bool { return d.acked >= seq }, "ack")
}

func (d *testDevice) waitRejections(n int) []*pb.Rejection {
	d.t.Helper()
	d.waitFor(func() bool { return len(d.rejs) >= n }, "rejections")
	d.mu.Lock()
	defer d.mu.Unlock()
	return append([]*pb.Rejection(nil), d.rejs...)
}

func (d *testDevice) close() {
	_ = d.stream.CloseSend()
	d.cancel()
}

func summary(seq uint64, tMS int64, spo2 float64) *pb.ConnectRequest {
	q, pulse := 0.9, 72.0
	return &pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: seq, DeviceTimeUnixMs: tMS,
		Spo2Pct: &spo2, PulseBpm: &pulse, Quality: &q}}}
}

func summaryIntro(id string) *pb.Introduction {
	return &pb.Introduction{DeviceId: id, Model: "test-summary", Mode: pb.Mode_MODE_SUMMARY}
}

func rawIntro(id string, bits uint32) *pb.Introduction {
	return &pb.Introduction{DeviceId: id, Model: "test-raw", Mode: pb.Mode_MODE_RAW, AdcBits: bits}
}

// testProfile is a fast profile: spo2_low at 90 with a 3 s delay.
func testProfile(t testing.TB) *alarms.Profile {
	p, err := alarms.ParseProfile([]byte(`name: test-fast
conditions:
  - kind: spo2_low
    limit: 90
    hysteresis: 2
    delay: 3s
    priority: medium
    escalate: {below: 80, priority: high}
  - kind: pulse_high
    limit: 130
    delay: 5s
    priority: low
`))
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// metrics returns the text of the gateway's /metrics.
func (h *harness) metrics(t testing.TB) string {
	t.Helper()
	resp, err := http.Get("http://" + h.httpAddr + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}
