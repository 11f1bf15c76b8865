package gateway

import (
	"context"
	"math"
	"strings"
	"sync"
	"testing"
	"time"

	"pgregory.net/rapid"

	"github.com/pulsefleet/pulsefleet/alarms"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Device time policy (internal/gateway/doc.go, "Device time"): these tests drive the
// gateway clock by hand (Options.Now), one second of gateway time per
// message, as a device sending one summary a second in real time would.

// manualClock is a gateway clock the test moves.
type manualClock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *manualClock) now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *manualClock) add(d time.Duration) time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.t = c.t.Add(d)
	return c.t
}

func clockHarness(t *testing.T) (*harness, *manualClock) {
	clk := &manualClock{t: time.Now().Truncate(time.Second)}
	h := newHarness(t, func(o *Options) { o.DefaultProfile = testProfile(t); o.Now = clk.now })
	return h, clk
}

// deviceState returns a device's live priority and active conditions.
func deviceState(t *testing.T, h *harness, id string) (pb.Priority, []string) {
	t.Helper()
	devs, err := h.fleet().ListDevices(context.Background(), &pb.ListDevicesRequest{})
	if err != nil {
		t.Fatal(err)
	}
	for _, d := range devs.GetDevices() {
		if d.GetDeviceId() == id {
			return d.GetAlarmPriority(), d.GetActiveConditions()
		}
	}
	t.Fatalf("device %s not listed", id)
	return 0, nil
}

func has(list []string, s string) bool {
	for _, x := range list {
		if x == s {
			return true
		}
	}
	return false
}

// waitSeq waits until message seq is acknowledged or rejected: the gateway
// has handled it (so the test may move the gateway clock on).
func (d *testDevice) waitSeq(seq uint64) {
	d.t.Helper()
	d.waitFor(func() bool {
		if d.acked >= seq {
			return true
		}
		for _, r := range d.rejs {
			if r.GetSequence() == seq {
				return true
			}
		}
		return false
	}, "message handled")
}

func storedPoints(t *testing.T, h *harness, id string) []store.Point {
	t.Helper()
	var out []store.Point
	if err := h.db.Trend(id, 0, math.MaxInt64, func(p store.Point) bool { out = append(out, p); return true }); err != nil {
		t.Fatal(err)
	}
	return out
}

// Finding: one summary stamped now+300 days, then 120 s at SpO2 80 with a
// correct clock, gave no episode at all while a control device got
// spo2_low, and it survived a restart. Now the stamped summary is refused
// (naming the field and the bound), the device alarms like the control, and
// nothing it left behind is in the future, also after a restart.
func TestDeviceClockForwardJumpCannotSilenceAlarms(t *testing.T) {
	h, clk := clockHarness(t)
	jumpy, _ := h.connect(t, summaryIntro("jumpy"))
	ctl, _ := h.connect(t, summaryIntro("control"))

	future := clk.now().Add(300 * 24 * time.Hour).UnixMilli()
	jumpy.send(summary(1, future, 97))
	rej := jumpy.waitRejections(1)[0]
	if rej.GetSequence() != 1 || rej.GetReason() != pb.RejectReason_REJECT_REASON_INVALID_FIELD ||
		rej.GetField() != "summary.device_time_unix_ms" || !strings.Contains(rej.GetDetail(), "ahead") {
		t.Fatalf("summary 300 days ahead: rejection %v, want invalid summary.device_time_unix_ms naming the bound", rej)
	}

	var seq uint64 = 1
	for i := 0; i < 120; i++ { // 120 s at SpO2 80, correct clocks, real time
		now := clk.add(time.Second).UnixMilli()
		seq++
		jumpy.send(summary(seq, now, 80))
		ctl.send(summary(seq-1, now, 80))
		if i%20 == 19 {
			jumpy.waitAck(seq)
			ctl.waitAck(seq - 1)
		}
	}
	jumpy.waitAck(seq)
	ctl.waitAck(seq - 1)
	for _, id := range []string{"control", "jumpy"} {
		// testProfile: spo2_low limit 90, delay 3 s, escalated to high below 80... 80 is not below 80: medium.
		if p, conds := deviceState(t, h, id); !has(conds, "spo2_low") || p < pb.Priority_PRIORITY_MEDIUM {
			t.Errorf("%s after 120 s at SpO2 80: priority %v conditions %v, want spo2_low announced", id, p, conds)
		}
	}
	jumpy.close()
	ctl.close()

	clk.add(2 * time.Second)
	h.restart()
	if _, conds := deviceState(t, h, "jumpy"); !has(conds, "spo2_low") {
		t.Errorf("jumpy after a restart: conditions %v, want spo2_low still active", conds)
	}
	// Evaluation goes on after the restart: a recovery clears the condition.
	jumpy, w := h.connect(t, summaryIntro("jumpy"))
	seq = w.GetResumeAfterSequence()
	for i := 0; i < 5; i++ {
		seq++
		jumpy.send(summary(seq, clk.add(time.Second).UnixMilli(), 97))
	}
	jumpy.waitAck(seq)
	if _, conds := deviceState(t, h, "jumpy"); has(conds, "spo2_low") {
		t.Errorf("jumpy after recovering to 97 %%: conditions %v, want spo2_low ended", conds)
	}
	jumpy.close()

	limit := clk.now().Add(clockAheadMax).UnixMilli()
	for _, p := range storedPoints(t, h, "jumpy") {
		if p.TimeMS > limit {
			t.Errorf("stored point at %d, %v ahead of the gateway clock", p.TimeMS, time.Duration(p.TimeMS-clk.now().UnixMilli())*time.Millisecond)
		}
	}
	eps, err := h.db.Episodes(store.EpisodeFilter{})
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range eps {
		if e.Device == "jumpy" && e.OnsetMS > limit {
			t.Errorf("episode %s starts %v ahead of the gateway clock", e.Condition, time.Duration(e.OnsetMS-clk.now().UnixMilli())*time.Millisecond)
		}
	}
}

// Finding: a clock stepped back by an hour had 60 s at SpO2 80 stored and
// no alarm. Now every message behind the last accepted device time is
// refused as stale (the device is told which), nothing is stored for it,
// and the technical alarm condition device_clock_fault is announced; once
// the clock is right again the fault ends and SpO2 is evaluated again.
func TestDeviceClockStepBackRaisesClockFault(t *testing.T) {
	h, clk := clockHarness(t)
	d, _ := h.connect(t, summaryIntro("stepper"))
	var seq uint64
	for i := 0; i < 30; i++ {
		seq++
		d.send(summary(seq, clk.add(time.Second).UnixMilli(), 97))
	}
	d.waitAck(seq)
	stepFrom := seq + 1
	for i := 0; i < 60; i++ { // the device clock reads an hour behind
		seq++
		d.send(summary(seq, clk.add(time.Second).Add(-time.Hour).UnixMilli(), 80))
		d.waitSeq(seq) // one message a second of gateway time
	}
	rejs := d.waitRejections(60)
	for i, r := range rejs {
		if r.GetSequence() != stepFrom+uint64(i) || r.GetReason() != pb.RejectReason_REJECT_REASON_STALE_DEVICE_TIME ||
			r.GetField() != "summary.device_time_unix_ms" {
			t.Fatalf("rejection %d: %v, want stale summary.device_time_unix_ms for sequence %d", i, r, stepFrom+uint64(i))
		}
	}
	waitUntil(t, func() bool {
		p, conds := deviceState(t, h, "stepper")
		return has(conds, "device_clock_fault") && p >= pb.Priority_PRIORITY_MEDIUM
	}, "device_clock_fault announced")
	if n := len(storedPoints(t, h, "stepper")); n != 30 {
		t.Errorf("%d points stored, want the 30 before the step", n)
	}

	// The clock is set right: accepted again, the fault ends once trusted
	// for clockClearAfter, SpO2 80 alarms.
	for i := 0; i < 10; i++ {
		seq++
		d.send(summary(seq, clk.add(time.Second).UnixMilli(), 80))
		d.waitSeq(seq)
	}
	d.waitAck(seq)
	_, conds := deviceState(t, h, "stepper")
	if has(conds, "device_clock_fault") || !has(conds, "spo2_low") {
		t.Errorf("after the clock is set right: conditions %v, want spo2_low and no device_clock_fault", conds)
	}
}

// A device clock that drifts is accepted while it stays within the stated
// tolerance (clockAheadMax ahead of the gateway clock) and alarms as usual;
// once the drift carries it beyond the bound its messages are refused
// naming the bound and device_clock_fault is announced.
func TestDeviceClockDriftWithinToleranceThenBeyond(t *testing.T) {
	h, clk := clockHarness(t)
	d, _ := h.connect(t, summaryIntro("drifter"))
	const fast = 1.02 // 20,000 ppm fast: exaggerated so the test is short
	dev := float64(clk.now().UnixMilli())
	var seq uint64
	send := func(spo2 float64) {
		clk.add(time.Second)
		dev += 1000 * fast
		seq++
		d.send(summary(seq, int64(dev), spo2))
		d.waitSeq(seq) // one message a second of gateway time
	}
	for i := 0; i < 120; i++ { // ahead by at most 2.4 s: within the tolerance
		send(80)
	}
	d.waitAck(seq)
	if _, conds := deviceState(t, h, "drifter"); !has(conds, "spo2_low") || has(conds, "device_clock_fault") {
		t.Errorf("drifting within tolerance: conditions %v, want spo2_low and no clock fault", conds)
	}
	if n := len(d.waitRejections(0)); n != 0 {
		t.Errorf("%d rejections while within tolerance", n)
	}
	for i := 0; i < 300; i++ { // reaches clockAheadMax after about 250 s
		send(97)
	}
	waitUntil(t, func() bool { _, conds := deviceState(t, h, "drifter"); return has(conds, "device_clock_fault") }, "device_clock_fault")
	rejs := d.waitRejections(1)
	if r := rejs[0]; r.GetReason() != pb.RejectReason_REJECT_REASON_INVALID_FIELD || r.GetField() != "summary.device_time_unix_ms" ||
		!strings.Contains(r.GetDetail(), "want at most") {
		t.Errorf("first rejection %v, want invalid summary.device_time_unix_ms naming the bound", r)
	}
}

// Finding: resending the same device times with other values overwrote
// stored history. Policy: reject as stale, keep the first. The device is
// told which messages were refused, the stored values stay the first ones,
// also after a restart.
func TestStaleDeviceTimesKeepTheFirstValues(t *testing.T) {
	h, clk := clockHarness(t)
	d, _ := h.connect(t, summaryIntro("resender"))
	t0 := clk.now().Add(-40 * time.Second).UnixMilli()
	for s := uint64(1); s <= 30; s++ {
		d.send(summary(s, t0+int64(s)*1000, 95))
	}
	d.waitAck(30)
	for s := uint64(31); s <= 60; s++ { // same device times, other values, new sequence numbers
		d.send(summary(s, t0+int64(s-30)*1000, 70))
	}
	rejs := d.waitRejections(30)
	for i, r := range rejs {
		if r.GetSequence() != uint64(31+i) || r.GetReason() != pb.RejectReason_REJECT_REASON_STALE_DEVICE_TIME ||
			r.GetField() != "summary.device_time_unix_ms" || !strings.Contains(r.GetDetail(), "first") {
			t.Errorf("rejection %d: %v, want stale summary.device_time_unix_ms for sequence %d", i, r, 31+i)
		}
	}
	d.send(summary(61, t0+31_000, 96)) // after the last accepted time: accepted
	d.waitAck(61)
	d.close()
	check := func(when string, want int) {
		pts := storedPoints(t, h, "resender")
		if len(pts) != want {
			t.Errorf("%s: %d points stored, want %d", when, len(pts), want)
		}
		for _, p := range pts {
			if p.SpO2 == 70 {
				t.Errorf("%s: point at %d holds the resent 70 %%, want the first value", when, p.TimeMS)
			}
		}
	}
	check("before restart", 31)
	h.restart()
	check("after restart", 31)
	d, w := h.connect(t, summaryIntro("resender"))
	if w.GetResumeAfterSequence() != 61 {
		t.Fatalf("resume after %d, want 61", w.GetResumeAfterSequence())
	}
	d.send(summary(62, t0+5_000, 60)) // a stored device time again, after the restart
	if r := d.waitRejections(1)[0]; r.GetSequence() != 62 || r.GetReason() != pb.RejectReason_REJECT_REASON_STALE_DEVICE_TIME {
		t.Errorf("after restart: rejection %v, want stale sequence 62", r)
	}
	d.send(summary(63, t0+32_000, 96))
	d.waitAck(63)
	check("after the resend following the restart", 32)
}

// The rule behind the device time policy, as a property: whatever device
// timestamps a device sends (jumps forward or back by up to a year, steps,
// repeats, a constant offset, drift, a clock running slow or stuck), while
// its SpO2 stays below the limit for two minutes of gateway time, spo2_low
// or the technical condition device_clock_fault is announced (active) at
// some point: nobody is left unwarned. And the engine's clock is never
// ahead of the gateway's by more than the tolerance. (That one of them is
// active at every moment is not claimed: after device_clock_fault ends, a
// clock that then runs slow can hold both off for up to clockLagMax plus the
// fault's delay; internal/gateway/doc.go says so.) It drives the functions accept uses (admitTime, evalPoint)
// with a real alarm engine of the built-in-like test profile, which has
// no device_clock_fault of its own: the engine adds the default one.
func TestPropertyNoDeviceTimestampsSilenceLowSpO2(t *testing.T) {
	prof := testProfile(t)
	const lateAfter = 10 * time.Second // Options.LateAfter's default
	rapid.Check(t, func(rt *rapid.T) {
		d := &device{id: "prop"}
		d.q.init()
		e, err := alarms.NewEngine(prof, d.id)
		if err != nil {
			rt.Fatal(err)
		}
		d.engine = e
		gw := int64(1_780_000_000_000)
		off := int64(0)    // device minus gateway clock, ms
		rate := 1.0        // device seconds per gateway second
		dev := float64(gw) // device clock
		var seq uint64
		// The messages at which the clock does something (none to all of
		// them): sometimes one clock mode holds through the low window.
		n := rapid.IntRange(0, 200).Draw(rt, "before")
		at := map[int]bool{}
		for _, i := range rapid.SliceOfN(rapid.IntRange(0, n+119), 0, 40).Draw(rt, "events at") {
			at[i] = true
		}
		k := 0
		step := func(spo2 float64) {
			ev := -1
			if at[k] {
				ev = rapid.IntRange(0, 5).Draw(rt, "event")
			}
			k++
			switch ev {
			case 0: // jump forward by up to a year
				off += rapid.Int64Range(1, 366*24*3600*1000).Draw(rt, "fwd")
				dev = float64(gw + off)
			case 1: // step back by up to a year
				off -= rapid.Int64Range(1, 366*24*3600*1000).Draw(rt, "back")
				dev = float64(gw + off)
			case 2: // small step either way
				off += rapid.Int64Range(-10_000, 10_000).Draw(rt, "small")
				dev = float64(gw + off)
			case 3: // the rate changes: stuck, slow, right, fast
				rate = rapid.SampledFrom([]float64{0, 0.001, 0.1, 0.5, 0.9, 0.999, 1, 1.0001, 1.02, 2, 20}).Draw(rt, "rate")
			case 4: // set right
				off, rate = 0, 1
				dev = float64(gw)
			case 5: // one wild message, the clock itself unchanged
				gw += 1000
				dev += 1000 * rate
				seq++
				wild := rapid.Int64Range(-400*24*3600*1000, 400*24*3600*1000).Draw(rt, "wild")
				d.mu.Lock()
				if rej, _ := d.admitTime(seq, "summary.device_time_unix_ms", gw+wild, 0, 0, gw, lateAfter, nil); rej == nil {
					d.evalPoint(&store.Point{TimeMS: gw + wild, SpO2: spo2, Pulse: 70, PI: 2, SQI: 0.9}, nil)
				}
				d.mu.Unlock()
				return
			}
			gw += 1000
			dev += 1000 * rate
			seq++
			tMS := int64(dev)
			d.mu.Lock()
			rej, _ := d.admitTime(seq, "summary.device_time_unix_ms", tMS, 0, 0, gw, lateAfter, nil)
			if rej == nil {
				d.evalPoint(&store.Point{TimeMS: tMS, SpO2: spo2, Pulse: 70, PI: 2, SQI: 0.9}, nil)
			}
			rt.Logf("seq %d gw %d: device %+d ms, accepted %v, session max %+d ms, fault %v, engine t %.3f open %v", seq, gw, tMS-gw, rej == nil, d.clock.maxOffMS, d.clock.fault, d.engineNowS(gw)-float64(gw)/1000, e.Episodes(nil))
			if e.LastT() > float64(gw+clockAheadMax.Milliseconds())/1000+1e-9 {
				rt.Fatalf("engine clock %v is %v s ahead of the gateway clock", e.LastT(), e.LastT()-float64(gw)/1000)
			}
			d.mu.Unlock()
		}
		for i := 0; i < n; i++ {
			step(97)
		}
		// The clock's rate as SpO2 falls (stuck, slow, right, fast); events
		// may change it during the window.
		rate = rapid.SampledFrom([]float64{0, 0.001, 0.1, 0.5, 1, 1.02, 20}).Draw(rt, "rate in window")
		alerted := func() bool {
			for _, ep := range e.Episodes(nil) {
				if ep.Phase == alarms.Active && (ep.Condition == "spo2_low" || ep.Condition == "device_clock_fault") {
					return true
				}
			}
			return false
		}
		ok := false
		for i := 0; i < 120; i++ { // two minutes below the limit
			step(80)
			d.mu.Lock()
			ok = ok || alerted()
			d.mu.Unlock()
		}
		if !ok {
			rt.Fatalf("two minutes at SpO2 80 and neither spo2_low nor device_clock_fault was announced: open episodes %+v", e.Episodes(nil))
		}
	})
}

// FuzzAdmitTime: a device time admitTime accepts is within the stated
// bounds of the gateway clock (at most a year behind, at most clockAheadMax
// ahead) and after every device time accepted before it; every refusal
// names the field and sets device_clock_fault.
func FuzzAdmitTime(f *testing.F) {
	f.Add(int64(0), int64(1000), int64(-5000), int64(3_000_000))
	f.Add(int64(300*24*3600*1000), int64(-3600_000), int64(5000), int64(5001))
	f.Fuzz(func(t *testing.T, a, b, c, dd int64) {
		d := &device{id: "fuzz"}
		e, err := alarms.NewEngine(testProfile(t), d.id)
		if err != nil {
			t.Fatal(err)
		}
		d.engine = e
		now := fuzzNow
		var last int64
		for i, off := range []int64{a, b, c, dd} {
			now += 1000
			dev := now + off
			if off > 0 && dev < now || off < 0 && dev > now {
				continue // overflow
			}
			rej, _ := d.admitTime(uint64(i+1), "summary.device_time_unix_ms", dev, 0, 0, now, 10*time.Second, nil)
			if rej != nil {
				if rej.GetField() != "summary.device_time_unix_ms" || rej.GetDetail() == "" || !e.ClockFault() {
					t.Fatalf("refusal %v: want the field, a reason and device_clock_fault set (set: %v)", rej, e.ClockFault())
				}
				continue
			}
			if dev <= 0 || dev < now-maxClockSkew || dev > now+clockAheadMax.Milliseconds() || dev <= last {
				t.Fatalf("accepted device time %d at gateway time %d after %d", dev, now, last)
			}
			last = dev
		}
	})
}

// After a rewind to the durable point (a new stream, or a batch that failed
// to commit), the device resends what was accepted but not durable with the
// same device times: they are accepted again, not refused as stale, however
// the sequence was rewound; durable device times stay refused.
func TestRewindAcceptsResentDeviceTimesAgain(t *testing.T) {
	for _, how := range []string{"rewindToDurable", "sequence only"} {
		d := &device{id: "rw"}
		now := fuzzNow
		tMS := func(seq uint64) int64 { return fuzzNow - 100_000 + int64(seq)*1000 }
		for seq := uint64(1); seq <= 10; seq++ {
			if rej, _ := d.admitTime(seq, "summary.device_time_unix_ms", tMS(seq), 0, 0, now, 10*time.Second, nil); rej != nil {
				t.Fatalf("%s: %v", how, rej)
			}
		}
		d.markDurable(6) // the batch with 7..10 failed
		switch how {
		case "rewindToDurable":
			d.rewindToDurable()
		default:
			d.cur.LastSeq = d.durableSeq
		}
		if rej, _ := d.admitTime(5, "summary.device_time_unix_ms", tMS(5), 0, 0, now, 10*time.Second, nil); rej == nil {
			t.Errorf("%s: a durable device time was accepted again", how)
		}
		for seq := uint64(7); seq <= 10; seq++ {
			if rej, _ := d.admitTime(seq, "summary.device_time_unix_ms", tMS(seq), 0, 0, now, 10*time.Second, nil); rej != nil {
				t.Errorf("%s: resent sequence %d refused: %v", how, seq, rej)
			}
		}
		d.markDurable(10)
		if d.clock.durableMS != tMS(10) || len(d.clock.pending) != 0 {
			t.Errorf("%s: durable device time %d, pending %v; want %d and none", how, d.clock.durableMS, d.clock.pending, tMS(10))
		}
	}
}
