package ingest

import (
	"testing"
	"time"

	"pgregory.net/rapid"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// The rule behind the device time policy, as a property: whatever device
// timestamps a device sends (jumps forward or back by up to a year, steps,
// repeats, a constant offset, drift, a clock running slow or stuck), while
// its SpO2 stays below the limit for two minutes of gateway time, spo2_low
// or the technical condition device_clock_fault is announced (active) at
// some point: nobody is left unwarned. And the engine's clock is never
// ahead of the gateway's by more than the tolerance. (That one of them is
// active at every moment is not claimed: after device_clock_fault ends, a
// clock that then runs slow can hold both off for up to clockLagMax plus the
// fault's delay; internal/ingest/doc.go says so.) It drives the functions accept uses (admitTime, evalPoint)
// with a real alarm engine of the built-in-like test profile, which has
// no device_clock_fault of its own: the engine adds the default one.
func TestPropertyNoDeviceTimestampsSilenceLowSpO2(t *testing.T) {
	prof := testProfile(t)
	const lateAfter = 10 * time.Second // Options.LateAfter's default
	rapid.Check(t, func(rt *rapid.T) {
		d := &device{id: "prop"}
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
			if e.LastT() > float64(gw+ClockAheadMax.Milliseconds())/1000+1e-9 {
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
// bounds of the gateway clock (at most a year behind, at most ClockAheadMax
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
			if dev <= 0 || dev < now-maxClockSkew || dev > now+ClockAheadMax.Milliseconds() || dev <= last {
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
