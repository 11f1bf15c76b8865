package estimator

import (
	"math"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// timelineSignal is seconds of a resting adult (ppgmodel defaults) at rate
// Hz, 16-bit codes.
func timelineSignal(rate, seconds int, seed uint64) (red, ir []float64) {
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: float64(rate), ADCBits: 16, Seed: seed})
	red = make([]float64, rate*seconds)
	ir = make([]float64, rate*seconds)
	src.Fill(red, ir, nil, ppgmodel.DefaultVitals())
	return red, ir
}

func newTimeline(t testing.TB) *Timeline {
	t.Helper()
	tl, err := NewTimeline(Config{ADCBits: 16})
	if err != nil {
		t.Fatal(err)
	}
	return tl
}

func TestTimelineSteadyStreamIsOneStream(t *testing.T) {
	// 25-sample chunks at 100 Hz, 250 ms apart on the device clock: the same
	// estimates as one Stream over all the samples, at t0 + (k+1) s.
	const rate, chunk, t0 = 100, 25, int64(1_764_000_000_000)
	red, ir := timelineSignal(rate, 20, 1)
	tl := newTimeline(t)
	var got []TimedEstimate
	for i := 0; i < len(red); i += chunk {
		var err error
		got, err = tl.Push(t0+int64(i)*1000/rate, rate, red[i:i+chunk], ir[i:i+chunk], nil, got)
		if err != nil {
			t.Fatal(err)
		}
	}
	st, err := New(Config{SampleRateHz: rate, ADCBits: 16})
	if err != nil {
		t.Fatal(err)
	}
	want := st.Push(red, ir, nil, nil)
	if len(got) != 20 || len(want) != 20 {
		t.Fatalf("%d timed estimates, %d from one stream, want 20 each (20 s)", len(got), len(want))
	}
	for k, e := range got {
		if e.Second != int64(k) || e.TimeMS != t0+int64(k+1)*1000 {
			t.Errorf("estimate %d: second %d at %d ms, want second %d at t0+%d ms", k, e.Second, e.TimeMS, k, (k+1)*1000)
		}
		if !sameEstimate(e.Estimate, want[k]) {
			t.Errorf("second %d: %+v, one stream gives %+v", k, e.Estimate, want[k])
		}
	}
	if tl.Restarts() != 1 {
		t.Errorf("%d restarts, want 1 (the start)", tl.Restarts())
	}
	// The resting adult is estimated once the window has filled (doc.go:
	// first values after about 3 s; ppgmodel drives R by the empirical line,
	// so SpO2 98 % comes back within a couple of points).
	if last := got[len(got)-1]; !(math.Abs(last.SpO2Pct-98) <= 2) {
		t.Errorf("last second SpO2 %v %%, want 98 +- 2 (the model's value)", last.SpO2Pct)
	}
}

// feed pushes 1 s chunks of red/ir starting at sample from, with the device
// time of each chunk given by at(k) for the k-th chunk.
func feed(t *testing.T, tl *Timeline, red, ir []float64, rate, from, chunks int, at func(k int) int64) []TimedEstimate {
	t.Helper()
	var out []TimedEstimate
	for k := range chunks {
		i := from + k*rate
		var err error
		if out, err = tl.Push(at(k), float64(rate), red[i:i+rate], ir[i:i+rate], nil, out); err != nil {
			t.Fatal(err)
		}
	}
	return out
}

func TestTimelineRestarts(t *testing.T) {
	const rate = 50
	red, ir := timelineSignal(rate, 40, 2)
	const t0 = int64(1_000_000)
	tests := []struct {
		name     string
		at       func(k int) int64 // device time of the k-th 1 s chunk (k = 0..19)
		gapAt    int               // Gap() before this chunk; -1 none
		restarts int
		t0s      []int64 // start time of each run
	}{
		{"clock jitter within 1 s continues", func(k int) int64 { return t0 + int64(k)*1000 + int64(k%3)*300 }, -1, 1, []int64{t0}},
		{"late by exactly 1 s continues", func(k int) int64 {
			if k >= 10 {
				return t0 + int64(k)*1000 + 1000
			}
			return t0 + int64(k)*1000
		}, -1, 1, []int64{t0}},
		{"jump of more than 1 s forward restarts", func(k int) int64 {
			if k >= 10 {
				return t0 + int64(k)*1000 + 1001
			}
			return t0 + int64(k)*1000
		}, -1, 2, []int64{t0, t0 + 11001}},
		{"jump back restarts", func(k int) int64 {
			if k >= 10 {
				return t0 + int64(k-10)*1000 - 5000
			}
			return t0 + int64(k)*1000
		}, -1, 2, []int64{t0, t0 - 5000}},
		{"gap restarts though the clock is continuous", func(k int) int64 { return t0 + int64(k)*1000 }, 10, 2, []int64{t0, t0 + 10000}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tl := newTimeline(t)
			var got []TimedEstimate
			for k := range 20 {
				if k == tc.gapAt {
					tl.Gap()
				}
				got = append(got, feed(t, tl, red, ir, rate, k*rate, 1, func(int) int64 { return tc.at(k) })...)
			}
			if tl.Restarts() != tc.restarts {
				t.Fatalf("%d restarts, want %d", tl.Restarts(), tc.restarts)
			}
			// Each run counts seconds from 0 at its own t0; 20 chunks of 1 s
			// give 20 seconds in all.
			if len(got) != 20 {
				t.Fatalf("%d estimates, want 20", len(got))
			}
			run := -1
			for i, e := range got {
				if e.Second == 0 {
					run++
				}
				if run < 0 || run >= len(tc.t0s) {
					t.Fatalf("estimate %d: second %d starts run %d, want %d runs", i, e.Second, run, len(tc.t0s))
				}
				if want := tc.t0s[run] + (e.Second+1)*1000; e.TimeMS != want {
					t.Errorf("estimate %d (run %d, second %d): %d ms, want %d", i, run, e.Second, e.TimeMS, want)
				}
			}
			if run != len(tc.t0s)-1 {
				t.Errorf("%d runs, want %d", run+1, len(tc.t0s))
			}
		})
	}
}

func TestTimelineRateChange(t *testing.T) {
	red50, ir50 := timelineSignal(50, 5, 3)
	red100, ir100 := timelineSignal(100, 5, 3)
	tl := newTimeline(t)
	out := feed(t, tl, red50, ir50, 50, 0, 5, func(k int) int64 { return int64(k) * 1000 })
	// Continuous clock, new rate: a new stream at 100 Hz.
	out = append(out, feed(t, tl, red100, ir100, 100, 0, 5, func(k int) int64 { return 5000 + int64(k)*1000 })...)
	if tl.Restarts() != 2 || len(out) != 10 || out[5].Second != 0 || out[5].TimeMS != 6000 || out[9].TimeMS != 10000 {
		t.Fatalf("restarts %d, %d estimates, 6th second %d at %d ms: want 2 restarts and the 100 Hz run at 6000..10000 ms",
			tl.Restarts(), len(out), out[5].Second, out[5].TimeMS)
	}
}

func TestTimelineBadRate(t *testing.T) {
	red, ir := timelineSignal(50, 4, 4)
	tl := newTimeline(t)
	out, err := tl.Push(0, 50, red[:50], ir[:50], nil, nil)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := tl.Push(1000, 10, red[50:60], ir[50:60], nil, out); err == nil || !strings.Contains(err.Error(), "SampleRateHz: 10 Hz, want 25..1000") {
		t.Fatalf("rate 10 Hz: %v, want an error naming SampleRateHz and the bound", err)
	}
	// The next good chunk starts over, even on a continuous clock.
	out, err = tl.Push(1000, 50, red[50:100], ir[50:100], nil, nil)
	if err != nil || tl.Restarts() != 2 || len(out) != 1 || out[0].Second != 0 || out[0].TimeMS != 2000 {
		t.Fatalf("after a bad chunk: %v, %d restarts, %+v; want a restart with second 0 at 2000 ms", err, tl.Restarts(), out)
	}
}

func TestNewTimelineErrors(t *testing.T) {
	for _, tc := range []struct {
		cfg  Config
		want string
	}{
		{Config{SampleRateHz: 100}, "SampleRateHz: 100, want 0"},
		{Config{AveragingS: 40}, "AveragingS: 40 s, want 0 (default 8 s) or 2..30 s"},
		{Config{ADCBits: 3}, "ADCBits: 3"},
	} {
		if _, err := NewTimeline(tc.cfg); err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("NewTimeline(%+v): %v, want %q", tc.cfg, err, tc.want)
		}
	}
}

func TestTimelinePushCodesMatchesPush(t *testing.T) {
	const rate = 100
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 5})
	v := ppgmodel.DefaultVitals()
	v.AmbientPct = 3
	red, ir, amb := make([]float64, rate*12), make([]float64, rate*12), make([]float64, rate*12)
	src.Fill(red, ir, amb, v)
	toCodes := func(f []float64) []uint32 {
		c := make([]uint32, len(f))
		for i, x := range f {
			c[i] = uint32(x)
		}
		return c
	}
	rc, ic, ac := toCodes(red), toCodes(ir), toCodes(amb)
	a, b := newTimeline(t), newTimeline(t)
	var ea, eb []TimedEstimate
	for i := 0; i < len(red); i += 25 {
		tm := int64(i) * 10
		var err1, err2 error
		ea, err1 = a.Push(tm, rate, red[i:i+25], ir[i:i+25], amb[i:i+25], ea)
		eb, err2 = b.PushCodes(tm, rate, rc[i:i+25], ic[i:i+25], ac[i:i+25], eb)
		if err1 != nil || err2 != nil {
			t.Fatal(err1, err2)
		}
	}
	if len(ea) != 12 || len(eb) != 12 {
		t.Fatalf("%d and %d estimates, want 12", len(ea), len(eb))
	}
	for k := range ea {
		if ea[k].TimeMS != eb[k].TimeMS || !sameEstimate(ea[k].Estimate, eb[k].Estimate) {
			t.Errorf("second %d: Push %+v, PushCodes %+v", k, ea[k], eb[k])
		}
	}
}

func TestTimelineSteadyStateDoesNotAllocate(t *testing.T) {
	const rate, chunk = 100, 25
	red, ir := timelineSignal(rate, 30, 6)
	rc, ic := make([]uint32, len(red)), make([]uint32, len(ir))
	for i := range red {
		rc[i], ic[i] = uint32(red[i]), uint32(ir[i])
	}
	tl := newTimeline(t)
	out := make([]TimedEstimate, 0, 4)
	i := 0
	push := func() {
		var err error
		out, err = tl.PushCodes(int64(i)*10, rate, rc[i:i+chunk], ic[i:i+chunk], nil, out[:0])
		if err != nil {
			t.Fatal(err)
		}
		i = (i + chunk) % len(rc) // wrapping jumps the clock back: restarts are allocation-free too
	}
	for range 8 {
		push() // grow the buffers
	}
	if n := testing.AllocsPerRun(400, push); n != 0 {
		t.Errorf("%v allocations per chunk, want 0", n)
	}
}

// BenchmarkTimeline is BenchmarkStream through a Timeline with codes, as
// the gateway and tune feed it: 100 Hz, 16-bit, 25-sample chunks. One op
// is 240 chunks (60 s), so 0 allocs/op is 0 allocations per chunk.
func BenchmarkTimeline(b *testing.B) {
	const rate, chunk, seconds = 100, 25, 60
	red, ir := timelineSignal(rate, seconds, 1)
	rc, ic := make([]uint32, len(red)), make([]uint32, len(ir))
	for i := range red {
		rc[i], ic[i] = uint32(red[i]), uint32(ir[i])
	}
	tl := newTimeline(b)
	out := make([]TimedEstimate, 0, 4)
	var t0 int64
	// Grow the conversion buffers before measuring.
	if _, err := tl.PushCodes(-1e6, rate, rc[:chunk], ic[:chunk], nil, out); err != nil {
		b.Fatal(err)
	}
	pairs := 0
	b.ReportAllocs()
	for b.Loop() {
		for i := 0; i < len(rc); i += chunk {
			var err error
			if out, err = tl.PushCodes(t0+int64(i)*10, rate, rc[i:i+chunk], ic[i:i+chunk], nil, out[:0]); err != nil {
				b.Fatal(err)
			}
		}
		t0 += seconds * 1000
		pairs += len(rc)
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(pairs), "ns/pair")
	b.ReportMetric(0, "ns/op")
}
