package gateway

import (
	"context"
	"math"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Device time policy (internal/ingest/doc.go, "Device time"): these tests drive the
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
