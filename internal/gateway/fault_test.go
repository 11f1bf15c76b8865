package gateway

import (
	"context"
	"fmt"
	"io"
	"math"
	"net/http"
	"regexp"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"google.golang.org/grpc"
	grpccodes "google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// intermittentFault fails one store write in every `every` while on is set.
type intermittentFault struct {
	on     atomic.Bool
	every  int64
	n      atomic.Int64
	failed atomic.Int64
}

func (f *intermittentFault) fault(*store.Batch) error {
	if !f.on.Load() {
		return nil
	}
	if f.n.Add(1)%f.every == 0 {
		f.failed.Add(1)
		return fmt.Errorf("%w (write %d)", store.ErrInjected, f.n.Load())
	}
	return nil
}

// checkAcknowledgedStored fails for every device whose acknowledged
// messages are not all in the store's ledger (the simulator numbers from 1
// without gaps on a fresh store, so "acknowledged through N" needs N
// distinct records) and returns how many messages were acknowledged.
func checkAcknowledgedStored(t *testing.T, db *store.DB, r *sim.Report) uint64 {
	t.Helper()
	tot, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	var acked uint64
	holes := 0
	for id, dr := range r.PerDevice {
		acked += dr.FramesAcked
		lt := tot[id]
		if lt.MaxSeq < dr.AckedThrough || lt.Chunks < dr.AckedThrough || !lt.Distinct {
			holes++
			if holes <= 5 {
				t.Errorf("%s: acknowledged through %d (%d messages), store ledger has %d records up to %d (distinct %v)",
					id, dr.AckedThrough, dr.FramesAcked, lt.Chunks, lt.MaxSeq, lt.Distinct)
			}
		}
		n := uint64(0)
		if err := db.Trend(id, 0, math.MaxInt64, func(store.Point) bool { n++; return true }); err != nil {
			t.Fatal(err)
		}
		if n < dr.AckedThrough {
			t.Errorf("%s: %d summaries acknowledged, %d trend points stored", id, dr.AckedThrough, n)
		}
	}
	if holes > 5 {
		t.Errorf("... %d devices in all have acknowledged messages missing from the store", holes)
	}
	return acked
}

func gaugeValue(t *testing.T, text, name string) float64 {
	t.Helper()
	m := regexp.MustCompile(`(?m)^` + regexp.QuoteMeta(name) + ` (\S+)$`).FindStringSubmatch(text)
	if m == nil {
		t.Fatalf("no %s in /metrics", name)
	}
	v, err := strconv.ParseFloat(m[1], 64)
	if err != nil {
		t.Fatal(err)
	}
	return v
}

func (h *harness) readyz(t *testing.T) (int, string) {
	t.Helper()
	resp, err := http.Get("http://" + h.httpAddr + "/readyz")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// Finding: with store writes failing now and then, a later batch of a
// device committed after an earlier one failed, and the device's cursor and
// acknowledgements jumped over the failed range (acknowledged messages
// missing from the store). One write in three fails while 40 summary
// devices stream at 20 messages/s each; every acknowledged message must be
// in the store, readiness must come back once writes succeed, and the
// connection gauge must count live streams only.
func TestIntermittentWriteFailuresLoseNothingAcknowledged(t *testing.T) {
	var f intermittentFault
	f.every = 3
	h := newHarness(t, nil)
	h.db.InjectWriteFault(f.fault)
	f.on.Store(true)

	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan *sim.Report, 1)
	go func() {
		r, err := sim.Run(ctx, sim.Options{Gateway: h.grpcAddr, Devices: 40, IDPrefix: "flaky", Mode: sim.ModeSummary,
			Speed: 20, Duration: 6 * time.Second, Seed: 7, Drain: 15 * time.Second})
		if err != nil {
			t.Errorf("sim: %v", err)
		}
		done <- r
	}()
	time.Sleep(3 * time.Second)
	if code, body := h.readyz(t); code != http.StatusServiceUnavailable && f.failed.Load() > 0 {
		// Not asserted strictly: a write may just have succeeded.
		t.Logf("readyz while writes fail now and then: %d %s", code, body)
	}
	f.on.Store(false) // the disk has room again
	r := <-done
	if r == nil {
		t.Fatal("no simulator report")
	}
	if f.failed.Load() == 0 {
		t.Fatal("no write failed: the test proved nothing")
	}

	// Readiness recovers once writes commit again.
	deadline := time.Now().Add(10 * time.Second)
	for {
		code, body := h.readyz(t)
		if code == http.StatusOK {
			break
		}
		if time.Now().After(deadline) {
			t.Errorf("/readyz stays %d after writes succeed again: %s", code, body)
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	// The simulator has ended every stream: none is counted as connected.
	deadline = time.Now().Add(10 * time.Second)
	for {
		v := gaugeValue(t, h.metrics(t), "pulsefleet_devices_connected")
		if v == 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Errorf("pulsefleet_devices_connected is %v with no stream open", v)
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	h.stop()
	db, err := store.Open(h.dir, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	acked := checkAcknowledgedStored(t, db, r)
	if acked == 0 {
		t.Fatal("nothing acknowledged: the test proved nothing")
	}
	if r.ResumeRegress > 0 {
		t.Errorf("%d welcomes resumed below what had been acknowledged", r.ResumeRegress)
	}
	t.Logf("%d store writes failed; %d messages acknowledged, all stored; %d reconnects", f.failed.Load(), acked, r.Reconnects)
}

// stuckDevice opens a stream on its own connection, introduces id, and
// sends n summaries with an out-of-range value as fast as it can without
// ever reading: every one earns a rejection, so the gateway's answers pile
// up until the transport stops taking them.
func (h *harness) stuckDevice(t *testing.T, id string, n int) (pb.IngestService_ConnectClient, func()) {
	t.Helper()
	// Fixed client windows (no automatic growth): the client's transport
	// buffers at most 64 KiB of answers it is not asked for.
	conn, err := grpc.NewClient(h.grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()),
		grpc.WithInitialWindowSize(64<<10), grpc.WithInitialConnWindowSize(64<<10))
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro(id)}}); err != nil {
		t.Fatal(err)
	}
	// The sends run on their own goroutine: on a slow machine (or under the
	// race detector) the gateway stops reading before n are sent, and a Send
	// then blocks until stop cancels the stream.
	now := time.Now().UnixMilli()
	sent := make(chan struct{})
	go func() {
		defer close(sent)
		for i := 1; i <= n; i++ {
			if err := st.Send(summary(uint64(i), now, 150)); err != nil { // spo2 150 %: rejected with a reason
				return
			}
		}
	}()
	return st, func() { cancel(); conn.Close(); <-sent }
}

// Finding: a stream whose device stopped reading locked its device id out:
// every reconnect waited 10 s and failed ("previous stream did not end").
// Now the reconnect replaces it at once, and a stuck stream left alone is
// cut off once a send has been blocked for the stall time.
func TestStuckReaderDoesNotLockTheDeviceOut(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.sendStall = 2 * time.Second })
	if err := h.g.SetSecurity(SecurityOptions{DeviceRate: 1e6, DeviceBurst: 1e6}); err != nil {
		t.Fatal(err)
	}
	_, stop := h.stuckDevice(t, "stuck-a", 20000)
	defer stop()
	waitFor(t, 20*time.Second, "the gateway's sends to stuck-a block", func() bool {
		return h.g.ingest.SendBlocked("stuck-a") > 200*time.Millisecond
	})
	start := time.Now()
	d, w := h.connect(t, summaryIntro("stuck-a"))
	t.Logf("a reconnect replaced the stuck stream in %v", time.Since(start))
	d.send(summary(w.GetResumeAfterSequence()+1, time.Now().UnixMilli(), 97))
	d.waitAck(w.GetResumeAfterSequence() + 1)

	// Left alone, a stuck stream is cut off and its device goes offline.
	_, stop2 := h.stuckDevice(t, "stuck-b", 20000)
	defer stop2()
	waitFor(t, 30*time.Second, "stuck-b cut off", func() bool {
		return !connected(h, "stuck-b") && strings.Contains(h.metrics(t), "pulsefleet_stream_send_stalls_total 1")
	})
}

func waitFor(t *testing.T, limit time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(limit)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting until %s", what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// Finding: messages up to the 8 MiB transport limit were received whole
// before the 64 KiB check; 20 such streams took the gateway from 58 to 272
// MiB. The transport limit is now the largest valid message (plus a
// quarter): the largest valid raw chunk is accepted, and 20 streams sending
// 7 MiB messages over and over leave the heap bounded while honest devices
// keep every acknowledged message.
func TestOversizedMessagesKeepMemoryBounded(t *testing.T) {
	h := newHarness(t, nil)
	// The largest valid message goes through a real stream.
	d, _ := h.connect(t, &pb.Introduction{DeviceId: "max-raw", Mode: pb.Mode_MODE_RAW, AdcBits: maxADCBits})
	codes := make([]uint32, 1000)
	for i := range codes {
		codes[i] = 1<<maxADCBits - 1
	}
	d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{Sequence: 1,
		DeviceTimeUnixMs: time.Now().UnixMilli() - 2000, SampleRateHz: 1000, Red: codes, Ir: codes, Ambient: codes, LedDriveMa: 255, Gain: 1000}}})
	d.waitAck(1)
	// A device message above MaxMessageBytes is rejected with a reason and
	// the stream goes on; one above the transport limit ends its stream
	// before it is read, with RESOURCE_EXHAUSTED.
	tooBig := make([]uint32, defaultMaxMessageBytes(1000)/2+10)
	d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{Sequence: 2,
		DeviceTimeUnixMs: time.Now().UnixMilli() - 1000, SampleRateHz: 100, Red: tooBig, Ir: tooBig}}})
	if r := d.waitRejections(1); r[0].GetReason() != pb.RejectReason_REJECT_REASON_TOO_LARGE {
		t.Errorf("a message above MaxMessageBytes: %v, want TOO_LARGE", r[0])
	}
	over := make([]uint32, transportMaxBytes/2+10)
	d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{Sequence: 2,
		DeviceTimeUnixMs: time.Now().UnixMilli() - 1000, SampleRateHz: 100, Red: over, Ir: over}}})
	select {
	case err := <-d.ended:
		if status.Code(err) != grpccodes.ResourceExhausted {
			t.Errorf("a message above the transport limit ended the stream with %v, want ResourceExhausted", err)
		}
	case <-time.After(20 * time.Second):
		t.Fatal("a message above the transport limit did not end the stream")
	}
	// The transport limit lets the largest valid request of any service through.
	if n := largestValidRequest(); n > transportMaxBytes || largestValidMessage(1000) > defaultMaxMessageBytes(1000) {
		t.Errorf("largest valid request %d bytes, transport limit %d", n, transportMaxBytes)
	}

	// One 7 MiB message, encoded once and shared by every hostile stream
	// (rawCodec sends the bytes as they are), so the test's own memory does
	// not grow with the streams.
	big, err := proto.Marshal(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{Sequence: 1,
		DeviceTimeUnixMs: time.Now().UnixMilli(), SampleRateHz: 100, Red: make([]uint32, 7<<20/2), Ir: make([]uint32, 7<<20/2)}}})
	if err != nil {
		t.Fatal(err)
	}
	intro, _ := proto.Marshal(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("hostile")}})
	heap := func() uint64 {
		runtime.GC()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		return ms.HeapInuse
	}
	before := heap()
	ctx, cancel := context.WithCancel(context.Background())
	var hw sync.WaitGroup
	var bigSent atomic.Int64
	const hostile = 20
	for i := 0; i < hostile; i++ {
		hw.Add(1)
		go func() {
			defer hw.Done()
			conn, err := grpc.NewClient(h.grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
			if err != nil {
				t.Error(err)
				return
			}
			defer conn.Close()
			for ctx.Err() == nil {
				st, err := conn.NewStream(ctx, &pb.IngestService_ServiceDesc.Streams[0], pb.IngestService_Connect_FullMethodName, grpc.ForceCodec(rawCodec{}))
				if err != nil {
					continue
				}
				_ = st.SendMsg(&intro)
				for k := 0; k < 3 && ctx.Err() == nil; k++ {
					bigSent.Add(1)
					if st.SendMsg(&big) != nil {
						break
					}
				}
				var b []byte
				for st.RecvMsg(&b) == nil {
				}
			}
		}()
	}
	// Honest devices stream meanwhile.
	var peak uint64
	stopPeak := make(chan struct{})
	peakDone := make(chan struct{})
	go func() {
		defer close(peakDone)
		for {
			select {
			case <-stopPeak:
				return
			case <-time.After(100 * time.Millisecond):
			}
			var ms runtime.MemStats
			runtime.ReadMemStats(&ms)
			peak = max(peak, ms.HeapInuse)
		}
	}()
	base := time.Now().Add(-time.Minute).UnixMilli()
	var wg sync.WaitGroup
	for i := 0; i < 10; i++ {
		wg.Add(1)
		go func(i int) {
			defer wg.Done()
			d, _ := h.connect(t, summaryIntro(fmt.Sprintf("honest-%02d", i)))
			for s := uint64(1); s <= 40; s++ {
				d.send(summary(s, base+int64(s)*1000, 96))
				time.Sleep(50 * time.Millisecond)
			}
			d.waitAck(40)
		}(i)
	}
	wg.Wait()
	time.Sleep(time.Second)
	cancel()
	hw.Wait()
	close(stopPeak)
	<-peakDone
	grew := int64(peak) - int64(before)
	t.Logf("heap in use %d MiB before, peak %d MiB while %d hostile streams sent %d messages of %d MiB",
		before>>20, peak>>20, hostile, bigSent.Load(), len(big)>>20)
	if bigSent.Load() < hostile {
		t.Fatalf("only %d oversized messages sent: the test proved nothing", bigSent.Load())
	}
	// Bound (internal/gateway/options.go): 144 KiB of received bytes per stream,
	// plus the transport's and the honest streams' own working memory.
	// Receiving the messages whole would take 20 x 7 MiB = 140 MiB.
	if grew > 48<<20 {
		t.Errorf("heap grew by %d MiB while hostile streams sent oversized messages, want < 48 MiB", grew>>20)
	}
	tot, err := h.db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 10; i++ {
		id := fmt.Sprintf("honest-%02d", i)
		if lt := tot[id]; lt.Chunks != 40 || !lt.Distinct {
			t.Errorf("%s: ledger %+v, want the 40 acknowledged messages once", id, lt)
		}
	}
}

// Finding: the per-stream limit counted messages only, so one device could
// send 190 times real time. Device time is limited too: with 1 device
// second per second and a 10 s burst, a stopped clock takes 10 summaries
// (1 s each) and refuses the rest, naming the limit; once the clock moves
// 10 s the device resends from the refused one and everything is kept.
func TestDeviceTimeRateLimit(t *testing.T) {
	var nowMS atomic.Int64
	nowMS.Store(time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC).UnixMilli())
	h := newHarness(t, func(o *Options) { o.Now = func() time.Time { return time.UnixMilli(nowMS.Load()) } })
	if err := h.g.SetSecurity(SecurityOptions{DeviceRate: 1e6, DeviceBurst: 1e6, DeviceTimeRate: 1, DeviceTimeBurst: 10 * time.Second}); err != nil {
		t.Fatal(err)
	}
	base := nowMS.Load() - 120_000
	d, _ := h.connect(t, summaryIntro("fast-clock"))
	for s := uint64(1); s <= 30; s++ {
		d.send(summary(s, base+int64(s)*1000, 95))
	}
	rejs := d.waitRejections(20)
	if r := rejs[0]; r.GetReason() != pb.RejectReason_REJECT_REASON_RATE_LIMITED || r.GetSequence() != 11 || r.GetField() != "device_time" ||
		!strings.Contains(r.GetDetail(), "1 s of device time per second") {
		t.Errorf("first refusal: %v, want RATE_LIMITED device_time for sequence 11", r)
	}
	d.waitAck(10)
	nowMS.Add(10_000)
	for s := uint64(11); s <= 20; s++ {
		d.send(summary(s, base+int64(s)*1000, 95))
	}
	d.waitAck(20)
	tot, err := h.db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if lt := tot["fast-clock"]; lt.Chunks != 20 || !lt.Distinct {
		t.Errorf("ledger %+v, want the 20 accepted messages", lt)
	}
}
