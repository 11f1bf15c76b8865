package gateway

import (
	"context"
	"fmt"
	"math"
	"strings"
	"sync"
	"testing"
	"time"

	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	reflectionpb "google.golang.org/grpc/reflection/grpc_reflection_v1"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// A standard client finds every service through reflection, and health
// checking reports SERVING.
func TestStandardClientsSeeServicesAndHealth(t *testing.T) {
	h := newHarness(t, nil)
	ctx := context.Background()
	hc, err := healthpb.NewHealthClient(h.conn).Check(ctx, &healthpb.HealthCheckRequest{})
	if err != nil || hc.GetStatus() != healthpb.HealthCheckResponse_SERVING {
		t.Fatalf("health: %v %v", hc, err)
	}
	rs, err := reflectionpb.NewServerReflectionClient(h.conn).ServerReflectionInfo(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := rs.Send(&reflectionpb.ServerReflectionRequest{MessageRequest: &reflectionpb.ServerReflectionRequest_ListServices{}}); err != nil {
		t.Fatal(err)
	}
	resp, err := rs.Recv()
	if err != nil {
		t.Fatal(err)
	}
	rs.CloseSend()
	got := map[string]bool{}
	for _, s := range resp.GetListServicesResponse().GetService() {
		got[s.GetName()] = true
	}
	for _, want := range []string{"pulsefleet.v1.IngestService", "pulsefleet.v1.FleetService", "pulsefleet.v1.AdminService",
		"grpc.health.v1.Health", "grpc.reflection.v1.ServerReflection"} {
		if !got[want] {
			t.Errorf("reflection does not list %s (got %v)", want, got)
		}
	}
}

// Every kind of bad input gets a rejection naming the field and the bound,
// the bad stream goes on, and 20 well-behaved streams beside it are stored
// completely.
func TestBadInputIsRejectedWhileHonestStreamsAreStored(t *testing.T) {
	h := newHarness(t, nil)
	const honest, perDevice = 20, 30
	base := time.Now().Add(-time.Minute).UnixMilli()

	var wg sync.WaitGroup
	for i := 0; i < honest; i++ {
		wg.Add(1)
		go func(i int) {
			defer wg.Done()
			d, w := h.connect(t, summaryIntro(fmt.Sprintf("honest-%02d", i)))
			if w.GetResumeAfterSequence() != 0 {
				t.Errorf("fresh device resumes after %d", w.GetResumeAfterSequence())
			}
			for s := uint64(1); s <= perDevice; s++ {
				d.send(summary(s, base+int64(s)*1000, 96))
			}
			d.waitAck(perDevice)
		}(i)
	}

	// Data before the introduction.
	bad := h.open(t)
	bad.send(summary(1, base, 97))
	// A raw device with every kind of bad chunk.
	bad.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: rawIntro("bad-raw", 16)}})
	chunk := func(seq uint64, rate float64, n int, v uint32) *pb.ConnectRequest {
		c := &pb.RawChunk{Sequence: seq, DeviceTimeUnixMs: base + int64(seq)*250, SampleRateHz: rate}
		for i := 0; i < n; i++ {
			c.Red, c.Ir = append(c.Red, v), append(c.Ir, v)
		}
		return &pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}}
	}
	cases := []struct {
		msg         *pb.ConnectRequest
		field, want string // rejection field and a fragment of its detail
	}{
		{chunk(1, -5, 25, 1000), "raw_chunk.sample_rate_hz", "want 25..1000"},
		{chunk(1, math.NaN(), 25, 1000), "raw_chunk.sample_rate_hz", "want 25..1000"},
		{chunk(1, math.Inf(1), 25, 1000), "raw_chunk.sample_rate_hz", "want 25..1000"},
		{chunk(1, 1e9, 25, 1000), "raw_chunk.sample_rate_hz", "want 25..1000"},
		{chunk(1, 100, 10000, 7), "message", "want at most 16384"},
		{chunk(1, 100, 2000, 7), "raw_chunk.red", "want 1..1000"},
		{chunk(1, 100, 25, 70000), "raw_chunk.red", "want 0..65535"},
		{chunk(1, 100, 25, 30000), "", ""},                    // accepted
		{chunk(1, 100, 25, 30000), "sequence", "not above 1"}, // stale once durable (waited for below)
		{chunk(5, 100, 25, 30000), "", ""},                    // accepted; 2..4 counted lost
		{chunk(3, 100, 25, 30000), "sequence", "not above 5"},
		{&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: 6, DeviceTimeUnixMs: base}}}, "summary", "raw mode"},
	}
	nrej := 1 // the data before the introduction
	for _, c := range cases {
		bad.send(c.msg)
		if c.field != "" {
			nrej++
		} else if seq := c.msg.GetRawChunk().GetSequence(); seq > 0 {
			// Only a resend of a durable message is answered as stale.
			bad.waitAck(seq)
		}
	}
	rejs := bad.waitRejections(nrej)
	if r := rejs[0]; r.GetReason() != pb.RejectReason_REJECT_REASON_NOT_INTRODUCED {
		t.Errorf("data before introduction: %v", r)
	}
	i := 1
	for _, c := range cases {
		if c.field == "" {
			continue
		}
		r := rejs[i]
		i++
		if r.GetField() != c.field || !strings.Contains(r.GetDetail(), c.want) {
			t.Errorf("rejection %d: field %q detail %q; want field %q and %q", i-1, r.GetField(), r.GetDetail(), c.field, c.want)
		}
	}
	bad.waitAck(5)

	// NaN and infinite values from a summary device.
	sd, _ := h.connect(t, summaryIntro("bad-summary"))
	nan, inf := math.NaN(), math.Inf(-1)
	sd.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: 1, DeviceTimeUnixMs: base, Spo2Pct: &nan}}})
	sd.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: 2, DeviceTimeUnixMs: base, PulseBpm: &inf}}})
	sd.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: 3, DeviceTimeUnixMs: -1}}})
	sr := sd.waitRejections(3)
	for i, f := range []string{"summary.spo2_pct", "summary.pulse_bpm", "summary.device_time_unix_ms"} {
		if sr[i].GetField() != f || sr[i].GetReason() != pb.RejectReason_REJECT_REASON_INVALID_FIELD {
			t.Errorf("summary rejection %d: %v, want field %s", i, sr[i], f)
		}
	}
	sd.send(summary(4, base+4000, 95))
	sd.waitAck(4) // the stream went on

	wg.Wait()
	tot, err := h.db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < honest; i++ {
		id := fmt.Sprintf("honest-%02d", i)
		lt := tot[id]
		if lt.Chunks != perDevice || lt.MaxSeq != perDevice || !lt.Distinct {
			t.Errorf("%s ledger: %+v, want %d distinct chunks", id, lt, perDevice)
		}
		n := 0
		h.db.Trend(id, 0, math.MaxInt64, func(p store.Point) bool { n++; return p.SpO2 == 96 })
		if n != perDevice {
			t.Errorf("%s: %d trend points, want %d", id, n, perDevice)
		}
	}
	if lt := tot["bad-raw"]; lt.Chunks != 2 || lt.Samples != 50 {
		t.Errorf("bad-raw ledger %+v, want the 2 accepted chunks", lt)
	}
	q, err := h.fleet().GetDeviceQuality(context.Background(), &pb.GetDeviceQualityRequest{DeviceId: "bad-raw"})
	if err != nil {
		t.Fatal(err)
	}
	if q.Quality.ClockDriftPpm != nil {
		t.Errorf("clock drift %v ppm from seconds of data: an estimate must be absent until there is one", q.Quality.GetClockDriftPpm())
	}
	if q.Quality.GetChunksLost() != 3 || q.Quality.GetDuplicates() != 2 {
		t.Errorf("bad-raw quality: lost %d (want 3: sequence 2..4), duplicates %d (want 2)", q.Quality.GetChunksLost(), q.Quality.GetDuplicates())
	}

	// /metrics counts what was accepted and rejected.
	body := h.metrics(t)
	for _, want := range []string{
		fmt.Sprintf(`pulsefleet_messages_received_total{mode="summary"} %d`, honest*perDevice+1),
		`pulsefleet_messages_rejected_total{reason="not_introduced"} 1`,
		`pulsefleet_messages_rejected_total{reason="stale_sequence"} 2`,
		`pulsefleet_messages_lost_total 3`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("/metrics lacks %q", want)
		}
	}
}

// A device that reconnects is told where to resume; what it resends is
// rejected as stale and stored once.
func TestResentChunksAreNeverStoredTwice(t *testing.T) {
	h := newHarness(t, nil)
	base := time.Now().Add(-time.Minute).UnixMilli()
	d, _ := h.connect(t, summaryIntro("ward-b-04"))
	for s := uint64(1); s <= 10; s++ {
		d.send(summary(s, base+int64(s)*1000, 94))
	}
	d.waitAck(10)
	d.close()

	d2, w := h.connect(t, summaryIntro("ward-b-04"))
	if w.GetResumeAfterSequence() != 10 {
		t.Fatalf("resume after %d, want 10", w.GetResumeAfterSequence())
	}
	for s := uint64(8); s <= 12; s++ {
		d2.send(summary(s, base+int64(s)*1000, 94))
	}
	d2.waitAck(12)
	rejs := d2.waitRejections(3)
	for _, r := range rejs {
		if r.GetReason() != pb.RejectReason_REJECT_REASON_STALE_SEQUENCE {
			t.Errorf("resend: %v", r)
		}
	}
	tot, _ := h.db.LedgerTotals()
	if lt := tot["ward-b-04"]; lt.Chunks != 12 || !lt.Distinct {
		t.Errorf("ledger %+v, want 12 distinct", lt)
	}
	n := 0
	h.db.Trend("ward-b-04", 0, math.MaxInt64, func(store.Point) bool { n++; return true })
	if n != 12 {
		t.Errorf("%d trend points, want 12", n)
	}
}

// Everything acknowledged survives a restart, and the trend query returns it
// raw and downsampled.
func TestAcknowledgedDataSurvivesRestart(t *testing.T) {
	h := newHarness(t, nil)
	base := (time.Now().Add(-10*time.Minute).UnixMilli() / 60000) * 60000
	d, _ := h.connect(t, summaryIntro("home-7"))
	for s := uint64(1); s <= 120; s++ {
		d.send(summary(s, base+int64(s-1)*1000, 90+float64(s%5)))
	}
	d.waitAck(120)
	d.close()
	h.restart()
	ctx := context.Background()
	resp, err := h.fleet().QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: "home-7", FromUnixMs: base, ToUnixMs: base + 120_000})
	if err != nil {
		t.Fatal(err)
	}
	if len(resp.Points) != 120 {
		t.Fatalf("%d points after restart, want 120", len(resp.Points))
	}
	ds, err := h.fleet().QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: "home-7", FromUnixMs: base, ToUnixMs: base + 120_000, StepMs: 60_000})
	if err != nil {
		t.Fatal(err)
	}
	if len(ds.Buckets) != 2 || ds.Buckets[0].Points != 60 || ds.Buckets[0].Spo2Pct.GetMin() != 90 || ds.Buckets[0].Spo2Pct.GetMax() != 94 ||
		math.Abs(ds.Buckets[0].Spo2Pct.GetMean()-92) > 1e-9 {
		t.Errorf("buckets: %v", ds.Buckets)
	}
	_, w := h.connect(t, summaryIntro("home-7"))
	if w.GetResumeAfterSequence() != 120 {
		t.Errorf("resume after %d, want 120", w.GetResumeAfterSequence())
	}
	if _, err := h.fleet().QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: "home-7", FromUnixMs: 5, ToUnixMs: 5}); err == nil ||
		!strings.Contains(err.Error(), "to_unix_ms") {
		t.Errorf("empty range: %v, want an error naming to_unix_ms", err)
	}
}

// A raw stream is turned into one trend point per second by the estimator;
// values follow the physical model's saturation.
func TestRawStreamBecomesEstimates(t *testing.T) {
	h := newHarness(t, nil)
	const rate, chunk, seconds = 100, 25, 40
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 7})
	v := ppgmodel.DefaultVitals()
	v.SpO2Pct, v.PulseBPM, v.PIPct = 93, 75, 2
	d, _ := h.connect(t, rawIntro("proto-a-01", 16))
	red, ir := make([]float64, chunk), make([]float64, chunk)
	base := time.Now().Add(-time.Hour).UnixMilli()
	var seq uint64
	for i := 0; i < rate*seconds/chunk; i++ {
		src.Fill(red, ir, nil, v)
		c := &pb.RawChunk{Sequence: uint64(i + 1), DeviceTimeUnixMs: base + int64(i*chunk*1000/rate), SampleRateHz: rate}
		for j := range red {
			c.Red, c.Ir = append(c.Red, uint32(red[j])), append(c.Ir, uint32(ir[j]))
		}
		d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
		seq = c.Sequence
	}
	d.waitAck(seq)
	var pts []store.Point
	h.db.Trend("proto-a-01", 0, math.MaxInt64, func(p store.Point) bool { pts = append(pts, p); return true })
	if len(pts) < seconds-1 {
		t.Fatalf("%d points for %d s of raw data", len(pts), seconds)
	}
	valid := 0
	for _, p := range pts[10:] { // after the estimator has settled
		if p.Source != uint8(pb.Source_SOURCE_GATEWAY) {
			t.Fatalf("source %d, want gateway", p.Source)
		}
		if !math.IsNaN(p.SpO2) {
			valid++
			// Model and gateway both use the empirical line (common practice), so
			// the estimate should sit on the model's saturation.
			if math.Abs(p.SpO2-93) > 2 || math.Abs(p.Pulse-75) > 3 {
				t.Errorf("t=%d: SpO2 %.1f pulse %.1f, want about 93 and 75", p.TimeMS-base, p.SpO2, p.Pulse)
			}
		}
	}
	if valid < len(pts[10:])*9/10 {
		t.Errorf("SpO2 on %d of %d settled seconds", valid, len(pts[10:]))
	}
}
