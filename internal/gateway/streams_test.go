package gateway

import (
	"context"
	"errors"
	"fmt"
	"math"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/metadata"
	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Over the message-rate limit a stream gets REJECT_REASON_RATE_LIMITED for
// each message over it and goes on; what it resends later is stored.
func TestRateLimitRejectsAndStreamGoesOn(t *testing.T) {
	var nowMS atomic.Int64 // a stopped clock: the bucket refills only when the test moves it
	nowMS.Store(time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC).UnixMilli())
	h := newHarness(t, func(o *Options) { o.Now = func() time.Time { return time.UnixMilli(nowMS.Load()) } })
	if err := h.g.SetSecurity(SecurityOptions{DeviceRate: 10, DeviceBurst: 20}); err != nil {
		t.Fatal(err)
	}
	base := nowMS.Load() - 60_000
	d, _ := h.connect(t, summaryIntro("fast-1"))
	for s := uint64(1); s <= 30; s++ {
		d.send(summary(s, base+int64(s)*1000, 95))
	}
	rejs := d.waitRejections(10)
	for i, r := range rejs {
		if r.GetReason() != pb.RejectReason_REJECT_REASON_RATE_LIMITED || r.GetSequence() != uint64(21+i) {
			t.Errorf("rejection %d: %v, want RATE_LIMITED for sequence %d", i, r, 21+i)
		}
	}
	d.waitAck(20)
	nowMS.Add(1000) // 10 more tokens
	// A later message may not overtake the refused one: 22 before 21 is
	// refused too (else 21 would count as lost and its resend as stale).
	d.send(summary(22, base+22000, 95))
	if r := d.waitRejections(11)[10]; r.GetReason() != pb.RejectReason_REJECT_REASON_RATE_LIMITED || r.GetSequence() != 22 || !strings.Contains(r.GetDetail(), "resend from sequence 21") {
		t.Errorf("22 before 21: %v, want RATE_LIMITED naming 21", r)
	}
	for s := uint64(21); s <= 30; s++ {
		d.send(summary(s, base+int64(s)*1000, 95))
	}
	d.waitAck(30)
	lost := func() uint64 {
		q, err := h.g.GetDeviceQuality(context.Background(), &pb.GetDeviceQualityRequest{DeviceId: "fast-1"})
		if err != nil {
			t.Fatal(err)
		}
		return q.GetQuality().GetChunksLost()
	}
	if n := lost(); n != 0 {
		t.Errorf("%d messages counted lost, want 0", n)
	}
	tot, err := h.db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if lt := tot["fast-1"]; lt.Chunks != 30 || !lt.Distinct || lt.MaxSeq != 30 {
		t.Errorf("ledger %+v, want 30 distinct messages", lt)
	}

	// A device that gives a refused message up is held back only so long:
	// after rateHoldMS its later messages are taken (the gap counts as lost).
	nowMS.Add(1000) // 10 more tokens
	for s := uint64(31); s <= 60; s++ {
		d.send(summary(s, base+int64(s)*1000, 95))
	}
	d.waitRejections(11 + 20) // 31..40 taken, 41 refused (no tokens), 42..60 held
	d.send(summary(42, base+42000, 95))
	d.waitRejections(11 + 21) // still held
	nowMS.Add(rateHoldMS + 1)
	d.send(summary(43, base+43000, 95))
	d.waitAck(43)
	if n := lost(); n != 2 {
		t.Errorf("%d messages counted lost, want 2 (41 and 42, given up)", n)
	}
}

// One stream per device: a second stream replaces the first (which ends
// with ABORTED), and the replacement is audited.
func TestSecondStreamReplacesFirst(t *testing.T) {
	h := newHarness(t, nil)
	base := time.Now().Add(-time.Minute).UnixMilli()
	first, _ := h.connect(t, summaryIntro("bed-r"))
	first.send(summary(1, base, 97))
	first.waitAck(1)
	second, w := h.connect(t, summaryIntro("bed-r"))
	if c := first.endCode(); c != codes.Aborted {
		t.Errorf("replaced stream ended with %v, want Aborted", c)
	}
	if w.GetResumeAfterSequence() != 1 {
		t.Errorf("second stream resumes after %d, want 1", w.GetResumeAfterSequence())
	}
	second.send(summary(2, base+1000, 97))
	second.waitAck(2)
	h.restart()
	es, _ := h.db.Audit(0, "stream.replace", 0)
	if len(es) != 1 || es[0].Device != "bed-r" || es[0].Actor != "device:bed-r" {
		t.Errorf("audit: %+v, want one stream.replace of bed-r", es)
	}
}

// A panic while serving a stream ends only that stream (INTERNAL); it is
// counted, the gateway stays ready, and the device resumes where it was.
func TestPanicInStreamIsRecovered(t *testing.T) {
	// The fault is a calibration resolver that panics for one reference: a
	// defect in code a stream calls.
	h := newHarness(t, func(o *Options) {
		o.ResolveCalibration = func(name string, redNM, irNM float64) (estimator.Calibration, string, error) {
			if name == "injected-fault" {
				panic("injected fault")
			}
			return calibration.Resolve(name, redNM, irNM, nil)
		}
	})
	base := time.Now().Add(-time.Minute).UnixMilli()
	other, _ := h.connect(t, summaryIntro("calm-1"))
	d, _ := h.connect(t, summaryIntro("boom-1"))
	d.send(summary(1, base, 97))
	d.send(summary(2, base+1000, 97))
	d.waitAck(2)
	in := rawIntro("boom-1", 16)
	in.CalibrationId = "injected-fault"
	boom := h.open(t)
	boom.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: in}})
	if c := boom.endCode(); c != codes.Internal {
		t.Errorf("panicking stream ended with %v, want Internal", c)
	}
	if !h.g.Ready() {
		t.Error("gateway not ready after a stream panicked")
	}
	other.send(summary(1, base, 98))
	other.waitAck(1)
	d2, w := h.connect(t, summaryIntro("boom-1"))
	if w.GetResumeAfterSequence() != 2 {
		t.Errorf("resume after %d, want 2", w.GetResumeAfterSequence())
	}
	d2.send(summary(3, base+2000, 97))
	d2.waitAck(3)
	if body := h.metrics(t); !strings.Contains(body, "pulsefleet_stream_panics_total 1") {
		t.Error("/metrics does not count the panic")
	}
}

// rawCodec sends bytes as they are, so a client can send what no honest
// encoder would.
type rawCodec struct{}

func (rawCodec) Marshal(v any) ([]byte, error) {
	if b, ok := v.(*[]byte); ok {
		return *b, nil
	}
	return nil, errors.New("rawCodec: want *[]byte")
}
func (rawCodec) Unmarshal(data []byte, v any) error {
	if b, ok := v.(*[]byte); ok {
		*b = append((*b)[:0], data...)
		return nil
	}
	return errors.New("rawCodec: want *[]byte")
}
func (rawCodec) Name() string { return "proto" } // the server decodes it as protobuf

// 10,000 malformed messages from many connections (garbage bytes, data
// before an introduction, invalid and oversized chunks, wrong credentials)
// while 20 honest devices stream: every acknowledged honest message is stored
// exactly once, the gateway keeps serving, and the refused credentials fill
// the audit log by at most the per-host limit.
func TestFloodOfMalformedMessagesLeavesHonestStreamsWhole(t *testing.T) {
	h := newHarness(t, nil)
	const honest, perDevice = 20, 40
	flooders, perFlooder := 40, 250 // 10,000 messages
	if testing.Short() {
		perFlooder = 50
	}
	base := time.Now().Add(-time.Minute).UnixMilli()
	var sent atomic.Int64
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()

	acked := make([]uint64, honest)
	var wg sync.WaitGroup
	for i := 0; i < honest; i++ {
		wg.Add(1)
		go func(i int) {
			defer wg.Done()
			d, _ := h.connect(t, summaryIntro(fmt.Sprintf("honest-%02d", i)))
			for s := uint64(1); s <= perDevice; s++ {
				d.send(summary(s, base+int64(s)*1000, 96))
			}
			d.waitAck(perDevice)
			d.mu.Lock()
			acked[i] = d.acked
			d.mu.Unlock()
		}(i)
	}

	garbage := func(k int) []byte {
		b := make([]byte, 1+k%97)
		for j := range b {
			b[j] = byte(k*31 + j*17)
		}
		return b
	}
	enc := func(m *pb.ConnectRequest) []byte { b, _ := proto.Marshal(m); return b }
	// Each flooder plays one part (f % 5):
	//   0 garbage bytes: the stream ends at the first (not protobuf); reopen;
	//   1 a wrong credential: refused at once; reopen;
	//   2 data before an introduction: rejected, the stream ends after 100; reopen;
	//   3 introduced, then chunks with NaN rates and mismatched channels: each rejected;
	//   4 introduced, then too many samples, zero-sequence and empty messages: each rejected.
	var fw sync.WaitGroup
	for f := 0; f < flooders; f++ {
		fw.Add(1)
		go func(f int) {
			defer fw.Done()
			part := f % 5
			var st grpc.ClientStream
			var ended chan struct{}
			open := func() {
				sctx := ctx
				if part == 1 {
					sctx = metadata.AppendToOutgoingContext(ctx, "authorization", "Bearer pf1_bad_"+fmt.Sprint(f))
				}
				var err error
				st, err = h.conn.NewStream(sctx, &pb.IngestService_ServiceDesc.Streams[0], pb.IngestService_Connect_FullMethodName, grpc.ForceCodec(rawCodec{}))
				if err != nil {
					t.Errorf("flooder %d: %v", f, err)
					return
				}
				ended = make(chan struct{})
				go func(st grpc.ClientStream, ended chan struct{}) { // drain answers until the stream ends
					defer close(ended)
					var b []byte
					for st.RecvMsg(&b) == nil {
					}
				}(st, ended)
				if part == 3 || part == 4 {
					b := enc(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: rawIntro(fmt.Sprintf("flood-%02d", f), 12)}})
					_ = st.SendMsg(&b)
				}
			}
			reopen := func() {
				_ = st.CloseSend()
				select {
				case <-ended:
				case <-time.After(20 * time.Second):
					t.Errorf("flooder %d: the gateway did not end a stream", f)
				}
				open()
			}
			open()
			for k := 0; k < perFlooder; k++ {
				var b []byte
				switch part {
				case 0, 1:
					b = garbage(f*perFlooder + k)
				case 2:
					b = enc(summary(uint64(k+1), base, 97))
				case 3:
					c := &pb.RawChunk{Sequence: uint64(k + 1), DeviceTimeUnixMs: base, SampleRateHz: math.NaN(), Red: []uint32{1}, Ir: []uint32{1, 2}}
					b = enc(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
				case 4:
					switch k % 3 {
					case 0:
						// Too many samples, within the transport's size limit
						// (a larger message ends the stream: TestOversizedMessagesKeepMemoryBounded).
						c := &pb.RawChunk{Sequence: uint64(k + 1), DeviceTimeUnixMs: base, SampleRateHz: 100, Red: make([]uint32, 4000), Ir: make([]uint32, 4000)}
						b = enc(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
					case 1:
						b = enc(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{Sequence: 0, Red: make([]uint32, 200)}}})
					case 2:
						b = enc(&pb.ConnectRequest{})
					}
				}
				sent.Add(1)
				_ = st.SendMsg(&b)
				if part == 0 || part == 1 || (part == 2 && (k+1)%maxRejectsBeforeIntro == 0) {
					reopen()
				}
			}
			_ = st.CloseSend()
			<-ended
		}(f)
	}
	fw.Wait()
	wg.Wait()
	cancel()

	if n := sent.Load(); n != int64(flooders*perFlooder) {
		t.Errorf("sent %d malformed messages, want %d", n, flooders*perFlooder)
	}
	if !h.g.Ready() {
		t.Fatal("gateway not ready after the flood")
	}
	if hc, err := healthpb.NewHealthClient(h.conn).Check(context.Background(), &healthpb.HealthCheckRequest{}); err != nil || hc.GetStatus() != healthpb.HealthCheckResponse_SERVING {
		t.Fatalf("health after the flood: %v %v", hc, err)
	}
	tot, err := h.db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	curs, err := h.db.Cursors()
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < honest; i++ {
		id := fmt.Sprintf("honest-%02d", i)
		lt, c := tot[id], curs[id]
		if lt.Chunks != acked[i] || lt.MaxSeq != acked[i] || !lt.Distinct || c.LastSeq != acked[i] {
			t.Errorf("%s: ledger %+v, cursor last %d; want every one of the %d acknowledged messages once", id, lt, c.LastSeq, acked[i])
		}
		n := 0
		h.db.Trend(id, 0, math.MaxInt64, func(p store.Point) bool { n++; return true })
		if uint64(n) != acked[i] {
			t.Errorf("%s: %d trend points, want %d", id, n, acked[i])
		}
	}
	// The malformed messages did reach the gateway's checks.
	var rejected float64
	for _, line := range strings.Split(h.metrics(t), "\n") {
		if strings.HasPrefix(line, "pulsefleet_messages_rejected_total{") {
			var v float64
			fmt.Sscan(line[strings.LastIndexByte(line, ' ')+1:], &v)
			rejected += v
		}
	}
	// Parts 2, 3 and 4 are rejected one by one (with a reason); part 1 is
	// refused before its first message; part 0's garbage ends its stream
	// unless it happens to decode as a (meaningless) message, then rejected.
	if lo, hi := float64(3*(flooders/5)*perFlooder), float64(4*(flooders/5)*perFlooder); rejected < lo || rejected > hi {
		t.Errorf("%.0f malformed messages rejected with a reason, want %.0f..%.0f", rejected, lo, hi)
	}
	// The gateway still takes new devices.
	d, _ := h.connect(t, summaryIntro("after-flood"))
	d.send(summary(1, base, 97))
	d.waitAck(1)
	h.stop()
	// The refused credentials were audited within the per-host limit (all
	// flooders share 127.0.0.1; the test may straddle minute boundaries, and
	// take minutes under the race detector on a loaded machine).
	db, err := store.Open(h.dir, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	es, _ := db.Audit(0, "auth.", 0)
	if n := 10 * (1 + int(time.Since(time.UnixMilli(base)).Minutes())); len(es) == 0 || len(es) > n {
		t.Errorf("%d auth audit entries after the flood, want 1..%d (10 per host per minute)", len(es), n)
	}
}

// Every message gets its answer: a burst of invalid messages, sent faster
// than the stream's sender delivers answers, is answered message for
// message (the answers wait for the sender; none is dropped), so a device
// never waits for an answer that will not come.
func TestBurstOfRejectionsIsAnsweredInFull(t *testing.T) {
	h := newHarness(t, nil)
	if err := h.g.SetSecurity(SecurityOptions{DeviceRate: 1e6, DeviceBurst: 1e6, DeviceTimeRate: 1e6, DeviceTimeBurst: 24 * time.Hour}); err != nil {
		t.Fatal(err)
	}
	d, _ := h.connect(t, summaryIntro("burst-1"))
	const n = 3000
	base := time.Now().Add(-time.Minute).UnixMilli()
	for i := 1; i <= n; i++ {
		d.send(summary(uint64(i), base+int64(i)*1000, 150)) // SpO2 150 %: rejected with a reason
	}
	rejs := d.waitRejections(n)
	for i, r := range rejs[:n] {
		if r.GetSequence() != uint64(i+1) || r.GetField() != "summary.spo2_pct" {
			t.Fatalf("rejection %d: %v, want sequence %d naming summary.spo2_pct", i, r, i+1)
		}
	}
}
