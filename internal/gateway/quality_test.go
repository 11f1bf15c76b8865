package gateway

import (
	"context"
	"math"
	"math/rand/v2"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// fakeClock is the gateway clock of a test: it moves only when told.
type fakeClock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *fakeClock) Now() time.Time  { c.mu.Lock(); defer c.mu.Unlock(); return c.t }
func (c *fakeClock) set(t time.Time) { c.mu.Lock(); c.t = t; c.mu.Unlock() }

// qualityDevice drives one summary device against a gateway whose clock the
// test moves: it knows what it injected and so what the figures must be.
type qualityDevice struct {
	t        *testing.T
	h        *harness
	clk      *fakeClock
	id       string
	d        *testDevice
	g0       time.Time
	ppm      float64
	offsetMS int64
}

// devTime is the device clock when the gateway clock reads g.
func (q *qualityDevice) devTime(g time.Time) int64 {
	el := g.Sub(q.g0).Milliseconds()
	return q.g0.UnixMilli() + q.offsetMS + el + int64(math.Round(float64(el)*q.ppm/1e6))
}

func (q *qualityDevice) connect(at time.Time) *pb.Welcome {
	q.clk.set(at)
	d, w := q.h.connect(q.t, summaryIntro(q.id))
	q.d = d
	return w
}

func (q *qualityDevice) disconnect(at time.Time) {
	q.clk.set(at)
	q.d.close()
	deadline := time.Now().Add(10 * time.Second)
	for {
		if !connected(q.h, q.id) {
			return
		}
		if time.Now().After(deadline) {
			q.t.Fatal("stream did not end")
		}
		time.Sleep(2 * time.Millisecond)
	}
}

// send sends a summary stamped devMS that arrives at gateway time arrive,
// and waits until it is durable.
func (q *qualityDevice) send(seq uint64, devMS int64, arrive time.Time, spo2 *float64, sqi, pi float64) {
	q.clk.set(arrive)
	pulse := 70.0
	q.d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: seq, DeviceTimeUnixMs: devMS,
		Spo2Pct: spo2, PulseBpm: &pulse, Quality: &sqi, PiPct: &pi}}})
	q.d.waitAck(seq)
}

// The quality figures of a summary device equal what the test injected:
// sessions and reconnects, skipped sequence numbers, resends, a late backlog,
// a known clock drift under jittered delay, SpO2 gaps, SQI/PI values,
// battery, uptime; and the labelled gauges follow (their deletion is
// TestSeriesOfDevicesIdleBeyondRetentionAreDeleted's).
func TestQualityFiguresMatchInjectedFaults(t *testing.T) {
	clk := &fakeClock{}
	g0 := time.Now().Add(-2 * time.Hour).Truncate(30 * time.Minute).Add(time.Minute)
	clk.set(g0)
	h := newHarness(t, func(o *Options) { o.Now = clk.Now })
	q := &qualityDevice{t: t, h: h, clk: clk, id: "q-sum-01", g0: g0, ppm: 40, offsetMS: 2500}
	rng := rand.New(rand.NewPCG(7, 7))
	at := func(d time.Duration) time.Time { return g0.Add(d) }

	sqis := []float64{0.25, 0.55, 0.85} // cycled: p10, p50, p90 are these
	pis := []float64{0.5, 2, 8}
	var sent, valid int
	var order []bool // validity of every accepted second, in arrival order
	live := func(k int, seq uint64) {
		sentAt := at(time.Duration(k) * 5 * time.Second)
		delay := 20 * time.Millisecond
		if k%6 != 0 { // jitter on five of six messages; the sixth is quick
			delay += time.Duration(rng.Int64N(2000)) * time.Millisecond
		}
		var spo2 *float64
		if k%4 != 3 { // every fourth second has no valid SpO2
			v := 96.0
			spo2 = &v
			valid++
		}
		order = append(order, spo2 != nil)
		sent++
		q.send(seq, q.devTime(sentAt), sentAt.Add(delay), spo2, sqis[k%3], pis[k%3])
	}

	// Session 1: 0..20 min, one message every 5 s; sequence numbers 61 and
	// 121..123 are skipped (4 lost).
	q.connect(at(0))
	seq := uint64(0)
	for k := 0; k < 240; k++ {
		seq++
		if seq == 61 || seq == 121 {
			seq += map[uint64]uint64{61: 1, 121: 3}[seq]
		}
		live(k, seq)
	}
	q.d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Status{Status: &pb.DeviceStatus{BatteryPct: 57, TemperatureC: 31, LinkQuality: 0.9}}})
	// One invalid summary (SpO2 out of range) is rejected.
	bad := 150.0
	q.d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: seq + 1, DeviceTimeUnixMs: q.devTime(at(20 * time.Minute)), Spo2Pct: &bad}}})
	q.d.waitRejections(1)
	q.disconnect(at(20 * time.Minute))

	// Offline 20..25 min: the device keeps the 48 summaries of 20..24 min;
	// at 25 min it reconnects, resends 3 it already had acknowledged
	// (duplicates), then the 48 kept ones, each at least 60 s behind its
	// clock (late).
	w := q.connect(at(25 * time.Minute))
	if w.GetResumeAfterSequence() != seq {
		t.Fatalf("resume after %d, want %d", w.GetResumeAfterSequence(), seq)
	}
	for i := uint64(0); i < 3; i++ {
		clk.set(at(25*time.Minute + 5*time.Millisecond))
		q.d.send(summary(seq-i, q.devTime(at(0)), 96))
	}
	q.d.waitRejections(3)
	for k := 240; k < 288; k++ {
		seq++
		sentAt := at(time.Duration(k) * 5 * time.Second)
		v := 95.0
		sent++
		valid++
		order = append(order, true)
		q.send(seq, q.devTime(sentAt), at(25*time.Minute+10*time.Millisecond), &v, sqis[k%3], pis[k%3])
	}
	// Live again 25..35 min (one message every 5 s, as before).
	for k := 300; k < 420; k++ {
		seq++
		live(k, seq)
	}
	q.disconnect(at(35 * time.Minute))
	// Session 3 from 36 min, still open at 37 min.
	q.connect(at(36 * time.Minute))
	seq++
	live(432, seq)
	clk.set(at(37 * time.Minute))

	got, err := h.fleet().GetDeviceQuality(context.Background(), &pb.GetDeviceQualityRequest{DeviceId: q.id})
	if err != nil {
		t.Fatal(err)
	}
	qq := got.GetQuality()
	checkU := func(name string, got, want uint64) {
		t.Helper()
		if got != want {
			t.Errorf("%s = %d, want %d (injected)", name, got, want)
		}
	}
	checkU("sessions", qq.GetSessions(), 3)
	checkU("reconnects", qq.GetReconnects(), 2)
	checkU("chunks_lost", qq.GetChunksLost(), 4)
	checkU("duplicates", qq.GetDuplicates(), 3)
	checkU("late_chunks", qq.GetLateChunks(), 48)
	checkU("chunks_accepted", qq.GetChunksAccepted(), uint64(sent))
	checkU("chunks_rejected", qq.GetChunksRejected(), 1)
	if d := qq.GetClockDriftPpm(); math.Abs(d-40) > 1 {
		t.Errorf("clock_drift_ppm = %.3f, want 40 +- 1 (injected)", d)
	}
	if v, want := qq.GetValidSpo2Share(), float64(valid)/float64(sent); math.Abs(v-want) > 1e-9 {
		t.Errorf("valid_spo2_share = %v, want %d/%d", v, valid, sent)
	}
	if s := qq.GetSqi(); s.GetCount() != uint64(sent) || math.Abs(s.GetP10()-0.25) > 0.011 || math.Abs(s.GetP50()-0.55) > 0.011 || math.Abs(s.GetP90()-0.85) > 0.011 {
		t.Errorf("sqi = %v, want %d values with p10/p50/p90 0.25/0.55/0.85", s, sent)
	}
	if p := qq.GetPiPct(); math.Abs(p.GetP10()/0.5-1) > 0.1 || math.Abs(p.GetP50()/2-1) > 0.1 || math.Abs(p.GetP90()/8-1) > 0.1 {
		t.Errorf("pi_pct = %v, want p10/p50/p90 about 0.5/2/8 %%", p)
	}
	if b := qq.GetBatteryPct(); b != 57 {
		t.Errorf("battery_pct = %v, want 57", b)
	}
	// Up 0..20, 25..35 and 36..37 min: 31 minutes of the 37 since the
	// device was first seen, in every window (uptime counts the part of a
	// window since first seen, issue 15).
	for _, c := range []struct {
		name      string
		got, want float64
	}{{"uptime_1h", qq.GetUptime_1H(), 31.0 / 37}, {"uptime_24h", qq.GetUptime_24H(), 31.0 / 37},
		{"uptime_7d", qq.GetUptime_7D(), 31.0 / 37}} {
		if math.Abs(c.got-c.want) > 1e-3*c.want {
			t.Errorf("%s = %.6f, want %.6f", c.name, c.got, c.want)
		}
	}

	// The labelled gauges, as a scrape sees them; the valid share covers the
	// last 300 seconds received.
	recent := 0
	for _, v := range order[len(order)-validWindow:] {
		if v {
			recent++
		}
	}
	body := h.metrics(t)
	for _, c := range []struct {
		series    string
		want, tol float64
	}{{`pulsefleet_device_connected{device="q-sum-01"}`, 1, 0}, {`pulsefleet_device_battery_ratio{device="q-sum-01"}`, 0.57, 1e-12},
		{`pulsefleet_device_clock_drift_ppm{device="q-sum-01"}`, 40, 1},
		{`pulsefleet_device_valid_spo2_ratio{device="q-sum-01"}`, float64(recent) / validWindow, 1e-12}} {
		got, ok := metricValue(body, c.series)
		if !ok || math.Abs(got-c.want) > c.tol {
			t.Errorf("%s = %v (present %v), want %v", c.series, got, ok, c.want)
		}
	}
}

// A device streaming for longer than the 7-day window is up the whole
// window, and the last drift estimate outlives a restart.
func TestLongSessionAndStoredDrift(t *testing.T) {
	clk := &fakeClock{}
	g0 := time.Now().Add(-10 * 24 * time.Hour).Truncate(time.Minute)
	clk.set(g0)
	h := newHarness(t, func(o *Options) { o.Now = clk.Now })
	q := &qualityDevice{t: t, h: h, clk: clk, id: "q-long", g0: g0, ppm: -30, offsetMS: -700}
	q.connect(g0)
	for k := 0; k < 120; k++ { // 20 minutes, every 10 s
		sentAt := g0.Add(time.Duration(k) * 10 * time.Second)
		v := 97.0
		q.send(uint64(k+1), q.devTime(sentAt), sentAt.Add(15*time.Millisecond), &v, 0.9, 1)
	}
	clk.set(g0.Add(9 * 24 * time.Hour))
	got, err := h.fleet().GetDeviceQuality(context.Background(), &pb.GetDeviceQualityRequest{DeviceId: q.id})
	if err != nil {
		t.Fatal(err)
	}
	if u := got.GetQuality().GetUptime_7D(); u != 1 {
		t.Errorf("uptime_7d = %v for a stream open for 9 days, want 1", u)
	}
	q.disconnect(g0.Add(9 * 24 * time.Hour))
	h.restart()
	got, err = h.fleet().GetDeviceQuality(context.Background(), &pb.GetDeviceQualityRequest{DeviceId: q.id})
	if err != nil {
		t.Fatal(err)
	}
	if d := got.GetQuality().GetClockDriftPpm(); math.Abs(d+30) > 1 {
		t.Errorf("clock_drift_ppm after restart = %.3f, want -30 +- 1 (stored)", d)
	}
}

// Raw chunks at a known rate: the effective rate is the nominal rate times
// the share of chunks received, and a new session starts a new measurement.
func TestEffectiveSampleRate(t *testing.T) {
	h := newHarness(t, nil)
	const rate, chunk = 100, 25
	base := time.Now().Add(-time.Hour).UnixMilli()
	send := func(d *testDevice, seq uint64, i int) {
		c := &pb.RawChunk{Sequence: seq, DeviceTimeUnixMs: base + int64(i*chunk*1000/rate), SampleRateHz: rate}
		for j := 0; j < chunk; j++ {
			v := uint32(30000 + 1000*math.Sin(float64(i*chunk+j)/10))
			c.Red, c.Ir = append(c.Red, v), append(c.Ir, v+5000)
		}
		d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
	}
	quality := func() *pb.DeviceQuality {
		got, err := h.fleet().GetDeviceQuality(context.Background(), &pb.GetDeviceQualityRequest{DeviceId: "q-raw"})
		if err != nil {
			t.Fatal(err)
		}
		return got.GetQuality()
	}
	// Session 1: chunks 0..79 made, 30..33 lost on the way (never sent).
	d, _ := h.connect(t, rawIntro("q-raw", 16))
	for i := 0; i < 80; i++ {
		if i >= 30 && i < 34 {
			continue
		}
		send(d, uint64(i+1), i)
	}
	d.waitAck(80)
	if got, want := quality().GetEffectiveSampleRateHz(), 100.0*75/79; math.Abs(got-want) > 1e-9 {
		t.Errorf("effective rate with 4 of 80 chunks lost: %v Hz, want %v (100 Hz x 75/79)", got, want)
	}
	if got := quality().GetChunksLost(); got != 4 {
		t.Errorf("chunks_lost %d, want 4", got)
	}
	d.close()
	// Session 2: nothing lost.
	d2, _ := h.connect(t, rawIntro("q-raw", 16))
	for i := 80; i < 160; i++ {
		send(d2, uint64(i+1), i)
	}
	d2.waitAck(160)
	if got := quality().GetEffectiveSampleRateHz(); math.Abs(got-100) > 1e-9 {
		t.Errorf("effective rate without loss: %v Hz, want 100", got)
	}
}

// metricValue finds one sample line of the text exposition format.
func metricValue(body, series string) (float64, bool) {
	for _, l := range strings.Split(body, "\n") {
		if rest, ok := strings.CutPrefix(l, series+" "); ok {
			v, err := strconv.ParseFloat(strings.TrimSpace(rest), 64)
			return v, err == nil
		}
	}
	return math.NaN(), false
}

func grepLines(s, sub string) string {
	var out []string
	for _, l := range strings.Split(s, "\n") {
		if strings.Contains(l, sub) {
			out = append(out, l)
		}
	}
	return strings.Join(out, "\n")
}

// A device silent for longer than the trend retention loses its labelled
// series at the next scrape (its history is gone too); a device seen
// recently keeps them.
func TestSeriesOfDevicesIdleBeyondRetentionAreDeleted(t *testing.T) {
	clk := &fakeClock{}
	g0 := time.Now().Add(-5 * 24 * time.Hour).Truncate(time.Minute)
	clk.set(g0)
	h := newHarness(t, func(o *Options) { o.Now = clk.Now; o.Retention.TrendDays = 2 })
	for _, id := range []string{"idle-01", "recent-01"} {
		q := &qualityDevice{t: t, h: h, clk: clk, id: id, g0: g0}
		q.connect(g0)
		v := 96.0
		q.send(1, q.devTime(g0), g0, &v, 0.9, 1)
		if id == "recent-01" {
			q.send(2, q.devTime(g0.Add(47*time.Hour)), g0.Add(47*time.Hour), &v, 0.9, 1)
		}
		q.disconnect(clk.Now())
	}
	if body := h.metrics(t); !strings.Contains(body, `pulsefleet_device_connected{device="idle-01"} 0`) {
		t.Fatalf("idle-01 has no series while within retention:\n%s", grepLines(body, "pulsefleet_device_"))
	}
	clk.set(g0.Add(49 * time.Hour))
	body := h.metrics(t)
	if strings.Contains(body, `device="idle-01"`) {
		t.Errorf("series of a device silent for 49 h with 2-day retention remain:\n%s", grepLines(body, "idle-01"))
	}
	if v, ok := metricValue(body, `pulsefleet_device_connected{device="recent-01"}`); !ok || v != 0 {
		t.Errorf("recent-01 connected series = %v (present %v), want 0", v, ok)
	}
}

// Seconds flagged by the estimator are counted: a 16-bit raw stream whose
// seconds 10..14 each hold one sample at the converter's limit (clipping) and
// whose seconds 15..29 swing only 40 codes, under the 100 codes needed for
// two significant digits (low resolution; docs/references.md rule of thumb,
// common practice). The estimator's band-pass filter rings for a couple of
// seconds after the swing drops, so low resolution is flagged on 12 to 15 of
// those seconds, and the share counts exactly the seconds stored with it.
func TestClippingAndLowResolutionShares(t *testing.T) {
	h := newHarness(t, nil)
	const rate, chunk, seconds = 100, 25, 30
	base := time.Now().Add(-time.Hour).UnixMilli()
	d, _ := h.connect(t, rawIntro("q-flags", 16))
	var seq uint64
	for i := 0; i < rate*seconds/chunk; i++ {
		c := &pb.RawChunk{Sequence: uint64(i + 1), DeviceTimeUnixMs: base + int64(i*chunk*1000/rate), SampleRateHz: rate}
		for j := 0; j < chunk; j++ {
			n := i*chunk + j
			sec := n / rate
			amp := 1000.0
			if sec >= 15 {
				amp = 20
			}
			v := 30000 + amp*math.Sin(2*math.Pi*1.2*float64(n)/rate)
			r := uint32(v)
			if sec >= 10 && sec < 15 && n%rate == 50 {
				r = 65535 // full scale of 16 bits
			}
			c.Red, c.Ir = append(c.Red, r), append(c.Ir, uint32(v)+4000)
		}
		d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
		seq = c.Sequence
	}
	d.waitAck(seq)
	got, err := h.fleet().GetDeviceQuality(context.Background(), &pb.GetDeviceQualityRequest{DeviceId: "q-flags"})
	if err != nil {
		t.Fatal(err)
	}
	q := got.GetQuality()
	var pts, lowRes int
	h.db.Trend("q-flags", 0, math.MaxInt64, func(p store.Point) bool {
		pts++
		if estimator.Flags(p.Flags).Has(estimator.FlagLowResolution) {
			lowRes++
		}
		return true
	})
	if pts != seconds {
		t.Fatalf("%d trend points for %d s", pts, seconds)
	}
	if c := q.GetClippingShare(); c != 5.0/seconds {
		t.Errorf("clipping share %v, want 5/30", c)
	}
	if l := q.GetLowResolutionShare(); lowRes < 12 || l != float64(lowRes)/seconds {
		t.Errorf("low resolution share %v with %d seconds flagged, want 12..15 of 30, counted exactly", l, lowRes)
	}
}
