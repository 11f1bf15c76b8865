package estimator

import (
	"math"
	"runtime"
	"strings"
	"testing"
	"unsafe"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
	"pgregory.net/rapid"
)

func TestConfigValidateNamesFieldAndBound(t *testing.T) {
	for _, c := range []struct {
		cfg  Config
		want string
	}{
		{Config{SampleRateHz: 24}, "SampleRateHz: 24 Hz, want 25..1000 Hz"},
		{Config{SampleRateHz: 1001}, "SampleRateHz"},
		{Config{SampleRateHz: math.NaN()}, "SampleRateHz"},
		{Config{SampleRateHz: 100, ADCBits: 4}, "ADCBits: 4, want 0 (unknown) or 6..24"},
		{Config{SampleRateHz: 100, AveragingS: 1}, "AveragingS: 1 s, want 0 (default 8 s) or 2..30 s"},
		{Config{SampleRateHz: 100, AveragingS: 31}, "AveragingS"},
	} {
		err := c.cfg.Validate()
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("Validate(%+v) = %v, want it to contain %q", c.cfg, err, c.want)
		}
		if _, err := New(c.cfg); err == nil {
			t.Errorf("New(%+v) accepted a bad config", c.cfg)
		}
	}
	for _, ok := range []Config{{SampleRateHz: 25}, {SampleRateHz: 1000, ADCBits: 24, AveragingS: 30}, {SampleRateHz: 30, AveragingS: 2}} {
		if err := ok.Validate(); err != nil {
			t.Errorf("Validate(%+v) = %v, want nil", ok, err)
		}
	}
}

func TestFlagsString(t *testing.T) {
	for _, c := range []struct {
		f    Flags
		want string
	}{
		{0, ""},
		{FlagNoPulse, "no_pulse"},
		{FlagNoPulse | FlagMotion, "no_pulse|motion"},
		{FlagSensorOff | FlagClipping | FlagLowResolution, "sensor_off|clipping|low_resolution"},
		{1 << 9, "unknown"},
	} {
		if got := c.f.String(); got != c.want {
			t.Errorf("Flags(%d).String() = %q, want %q", c.f, got, c.want)
		}
	}
}

// segment generates seconds of signal with fixed vitals and returns the
// estimates emitted meanwhile.
type rig struct {
	t   *testing.T
	src *ppgmodel.Source
	st  *Stream
	amb bool // pass the ambient channel to Push
}

func newRig(t *testing.T, mcfg ppgmodel.Config, cfg Config) *rig {
	st, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return &rig{t: t, src: ppgmodel.New(mcfg), st: st}
}

func (r *rig) run(seconds int, v ppgmodel.Vitals) []Estimate {
	rate := int(r.st.cfg.SampleRateHz)
	red := make([]float64, rate)
	ir := make([]float64, rate)
	amb := make([]float64, rate)
	var out []Estimate
	for k := 0; k < seconds; k++ {
		r.src.Fill(red, ir, amb, v)
		a := amb
		if !r.amb {
			a = nil
		}
		out = r.st.Push(red, ir, a, out)
	}
	return out
}

func TestSensorOffAndNoPulseWithholdEverything(t *testing.T) {
	r := newRig(t, ppgmodel.Config{SampleRateHz: 100, ADCBits: 16, Seed: 1}, Config{SampleRateHz: 100, ADCBits: 16})
	good := ppgmodel.DefaultVitals()
	before := r.run(20, good)
	if last := before[len(before)-1]; math.IsNaN(last.SpO2Pct) || last.Flags != 0 {
		t.Fatalf("clean signal: %+v, want a value and no flags", last)
	}
	off := good
	off.SensorOff = true
	for _, e := range r.run(10, off) {
		if !e.Flags.Has(FlagSensorOff) || !math.IsNaN(e.SpO2Pct) || !math.IsNaN(e.PulseBPM) || !math.IsNaN(e.PIPct) || !math.IsNaN(e.Ratio) || e.SQI != 0 {
			t.Errorf("sensor off, second %d: %+v, want sensor_off and everything withheld", e.Second, e)
		}
	}
	back := r.run(15, good)
	if last := back[len(back)-1]; math.IsNaN(last.SpO2Pct) || math.Abs(last.SpO2Pct-98) > 1 {
		t.Errorf("15 s after the sensor is back: %+v, want SpO2 near 98", last)
	}
	flat := good
	flat.PulseBPM = 0
	out := r.run(15, flat)
	for _, e := range out[5:] { // allow the window to empty
		if !e.Flags.Has(FlagNoPulse) || !math.IsNaN(e.SpO2Pct) || !math.IsNaN(e.PulseBPM) {
			t.Errorf("no pulsation, second %d: %+v, want no_pulse and values withheld", e.Second, e)
		}
	}
}

// A signal parked at the top of the converter clips; its beats must not feed
// the ratio.
func TestClippingFlaggedAndNotUsed(t *testing.T) {
	// Diastole (the brightest part of each beat) at 101 % of full scale.
	r := newRig(t, ppgmodel.Config{SampleRateHz: 100, ADCBits: 12, Seed: 2, DCLevel: 0.99}, Config{SampleRateHz: 100, ADCBits: 12})
	v := ppgmodel.DefaultVitals()
	v.PIPct = 3
	v.AmbientPct = 2
	out := r.run(20, v)
	for _, e := range out[2:] {
		if !e.Flags.Has(FlagClipping) {
			t.Errorf("second %d: flags %v, want clipping", e.Second, e.Flags)
		}
		if !math.IsNaN(e.SpO2Pct) {
			t.Errorf("second %d: SpO2 %.1f from clipped beats", e.Second, e.SpO2Pct)
		}
	}
}

// Room light adds to both channels' DC and would shrink the measured
// perfusion index; with the ambient channel subtracted PI is right.
func TestAmbientSubtraction(t *testing.T) {
	v := ppgmodel.DefaultVitals() // PI 2 %
	v.AmbientPct = 25             // on a DC of 50 % of full scale
	for _, withAmb := range []bool{true, false} {
		r := newRig(t, ppgmodel.Config{SampleRateHz: 100, ADCBits: 16, Seed: 3}, Config{SampleRateHz: 100, ADCBits: 16})
		r.amb = withAmb
		out := r.run(30, v)
		pi := out[len(out)-1].PIPct
		spo2 := out[len(out)-1].SpO2Pct
		t.Logf("ambient subtracted %v: PI %.2f %%, SpO2 %.1f", withAmb, pi, spo2)
		if withAmb && math.Abs(pi-2)/2 > 0.15 {
			t.Errorf("with ambient subtracted: PI %.2f %%, want 2 %% +- 15 %%", pi)
		}
		if !withAmb && pi > 2*0.8 {
			t.Errorf("without ambient subtraction: PI %.2f %%, want about 2/1.5", pi)
		}
		if withAmb && math.Abs(spo2-98) > 1 {
			t.Errorf("with ambient subtracted: SpO2 %.1f, want 98 +- 1", spo2)
		}
	}
}

// The perfusion index reported is the infrared AC/DC x 100 of the model
// (docs/references.md: PI = AC/DC x 100 of the infrared channel).
func TestPerfusionIndexTracksModel(t *testing.T) {
	for _, pi := range []float64{0.3, 1, 4, 10} {
		r := newRig(t, ppgmodel.Config{SampleRateHz: 100, ADCBits: 16, Seed: 4}, Config{SampleRateHz: 100, ADCBits: 16})
		v := ppgmodel.DefaultVitals()
		v.PIPct = pi
		out := r.run(20, v)
		got := out[len(out)-1].PIPct
		if math.Abs(got-pi)/pi > 0.2 {
			t.Errorf("PI %.2f %% -> reported %.2f %%, want within 20 %%", pi, got)
		}
	}
}

// Estimates do not depend on how the samples are chunked.
func TestChunkingDoesNotChangeEstimates(t *testing.T) {
	const rate = 50
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 5})
	n := rate * 30
	red, ir := make([]float64, n), make([]float64, n)
	src.Fill(red, ir, nil, ppgmodel.DefaultVitals())
	ref, _ := New(Config{SampleRateHz: rate, ADCBits: 16})
	want := ref.Push(red, ir, nil, nil)
	rapid.Check(t, func(rt *rapid.T) {
		st, _ := New(Config{SampleRateHz: rate, ADCBits: 16})
		var got []Estimate
		for i := 0; i < n; {
			k := rapid.IntRange(0, 200).Draw(rt, "chunk")
			k = min(k, n-i)
			got = st.Push(red[i:i+k], ir[i:i+k], nil, got)
			i += k
		}
		if len(got) != len(want) {
			rt.Fatalf("%d estimates, want %d", len(got), len(want))
		}
		for i := range got {
			if !sameEstimate(got[i], want[i]) {
				rt.Fatalf("estimate %d: %+v, want %+v", i, got[i], want[i])
			}
		}
	})
}

func sameEstimate(a, b Estimate) bool {
	eq := func(x, y float64) bool { return x == y || math.IsNaN(x) && math.IsNaN(y) }
	return a.Second == b.Second && a.Flags == b.Flags && eq(a.SpO2Pct, b.SpO2Pct) && eq(a.PulseBPM, b.PulseBPM) &&
		eq(a.PIPct, b.PIPct) && eq(a.Ratio, b.Ratio) && eq(a.SQI, b.SQI)
}

func TestResetStartsOver(t *testing.T) {
	const rate = 100
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 6})
	n := rate * 12
	red, ir := make([]float64, n), make([]float64, n)
	src.Fill(red, ir, nil, ppgmodel.DefaultVitals())
	st, _ := New(Config{SampleRateHz: rate, ADCBits: 16})
	first := st.Push(red, ir, nil, nil)
	st.Push(red[:345], ir[:345], nil, nil) // a partial stretch, then a gap
	st.Reset()
	again := st.Push(red, ir, nil, nil)
	if len(first) != 12 || len(again) != 12 {
		t.Fatalf("%d and %d estimates, want 12 each", len(first), len(again))
	}
	for i := range first {
		if !sameEstimate(first[i], again[i]) {
			t.Errorf("after Reset, estimate %d: %+v, want %+v", i, again[i], first[i])
		}
	}
	if again[0].Second != 0 {
		t.Errorf("after Reset the first Second is %d, want 0", again[0].Second)
	}
}

// Second k covers samples [ceil(k*rate), ceil((k+1)*rate)), also for a
// rate that is not a whole number.
func TestOneEstimatePerSecond(t *testing.T) {
	st, _ := New(Config{SampleRateHz: 30.5})
	x := make([]float64, 61)
	for i := range x {
		x[i] = 1000
	}
	out := st.Push(x[:30], x[:30], nil, nil)
	if len(out) != 0 {
		t.Fatalf("%d estimates after 30 samples at 30.5 Hz, want 0", len(out))
	}
	out = st.Push(x[:1], x[:1], nil, out)
	if len(out) != 1 || out[0].Second != 0 {
		t.Fatalf("after 31 samples: %+v, want second 0", out)
	}
	out = st.Push(x[:30], x[:30], nil, out[:0])
	if len(out) != 1 || out[0].Second != 1 {
		t.Fatalf("after 61 samples: %+v, want second 1", out)
	}
}

func TestPushDoesNotAllocate(t *testing.T) {
	const rate = 100
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 7})
	st, _ := New(Config{SampleRateHz: rate, ADCBits: 16})
	red, ir := make([]float64, 25), make([]float64, 25)
	out := make([]Estimate, 0, 2)
	v := ppgmodel.DefaultVitals()
	for k := 0; k < 400; k++ { // warm up: fill the window with beats
		src.Fill(red, ir, nil, v)
		out = st.Push(red, ir, nil, out[:0])
	}
	allocs := testing.AllocsPerRun(400, func() {
		src.Fill(red, ir, nil, v)
		out = st.Push(red, ir, nil, out[:0])
	})
	if allocs != 0 {
		t.Errorf("Push allocates %v times per 25-sample chunk", allocs)
	}
}

// The cardiac band is about 0.5-5 Hz, 30-300 /min (docs/references.md, Allen
// 2007 via notes): pulse rates across it are measured, with both pulse
// shapes (Tang et al. 2020), including the large diastolic wave of the
// "acceptable" shape, which must not count as a beat.
func TestPulseRateAcrossCardiacBand(t *testing.T) {
	for _, shape := range []ppgmodel.Shape{ppgmodel.ShapeExcellent, ppgmodel.ShapeAcceptable} {
		for _, bpm := range []float64{32, 45, 60, 90, 150, 200, 240, 280} {
			r := newRig(t, ppgmodel.Config{SampleRateHz: 100, ADCBits: 16, Seed: 8, Shape: shape}, Config{SampleRateHz: 100, ADCBits: 16})
			v := ppgmodel.DefaultVitals()
			v.PulseBPM = bpm
			out := r.run(30, v)
			last := out[len(out)-1]
			if math.IsNaN(last.PulseBPM) || math.Abs(last.PulseBPM-bpm) > 0.02*bpm+1 {
				t.Errorf("shape %d, %v /min: read %.1f /min (%v)", shape, bpm, last.PulseBPM, last.Flags)
			}
			if math.IsNaN(last.SpO2Pct) || math.Abs(last.SpO2Pct-98) > 1 {
				t.Errorf("shape %d, %v /min: SpO2 %.1f, want 98 +- 1", shape, bpm, last.SpO2Pct)
			}
		}
	}
}

// docs/references.md ("Project targets") budgets 64 KiB of memory per
// connected raw stream for the whole gateway. Measured, not sized by type:
// runtime.MemStats TotalAlloc (every heap byte allocated, garbage or not)
// around building streams and running each through 60 s of signal. The
// gateway's streams (100 Hz, the default 8 s window) may take 12 KiB of it
// (measured 6.9 KB on this machine); the most demanding configuration
// (1000 Hz, a 30 s window; measured 19.2 KB) 24 KiB.
func TestStreamMemoryIsBounded(t *testing.T) {
	for _, c := range []struct {
		name   string
		cfg    Config
		budget int64 // bytes per stream, construction and a minute of use
	}{
		{"default 100 Hz 8 s", Config{SampleRateHz: 100, ADCBits: 16}, 12 << 10},
		{"1000 Hz 30 s", Config{SampleRateHz: 1000, ADCBits: 16, AveragingS: MaxAveragingS}, 24 << 10},
	} {
		t.Run(c.name, func(t *testing.T) {
			per := streamHeapBytes(t, c.cfg, 60)
			t.Logf("%s: %d heap bytes per stream (built and run 60 s)", c.name, per)
			if per > c.budget {
				t.Errorf("%s: a stream takes %d heap bytes, want <= %d", c.name, per, c.budget)
			}
			if per < int64(unsafe.Sizeof(Stream{})) {
				t.Errorf("measured %d bytes, less than the Stream struct itself (%d): the measurement is broken", per, unsafe.Sizeof(Stream{}))
			}
		})
	}
}

// streamHeapBytes builds n streams with cfg, feeds each seconds of a
// generated signal in 25-sample chunks (the signal and the output slice are
// made before the measurement), and returns the heap bytes allocated per
// stream.
func streamHeapBytes(t *testing.T, cfg Config, seconds int) int64 {
	t.Helper()
	const n = 32
	rate := int(cfg.SampleRateHz)
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: cfg.SampleRateHz, ADCBits: 16, Seed: 3})
	red, ir := make([]float64, rate*seconds), make([]float64, rate*seconds)
	src.Fill(red, ir, nil, ppgmodel.DefaultVitals())
	out := make([]Estimate, 0, 64)
	streams := make([]*Stream, n)
	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	for i := range streams {
		st, err := New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		for k := 0; k+25 <= len(red); k += 25 {
			out = st.Push(red[k:k+25], ir[k:k+25], nil, out[:0])
		}
		streams[i] = st
	}
	runtime.ReadMemStats(&after)
	runtime.KeepAlive(streams)
	if len(out) == 0 && seconds > 10 {
		t.Fatal("no estimates: the streams did not run")
	}
	return int64(after.TotalAlloc-before.TotalAlloc) / n
}

// After the sensor is put back on (a restart), the recent-beat history of
// the previous placement must not judge the new beats: a new pulse rate is
// read as soon as the window has beats.
func TestRestartForgetsPreviousBeats(t *testing.T) {
	r := newRig(t, ppgmodel.Config{SampleRateHz: 100, ADCBits: 16, Seed: 9}, Config{SampleRateHz: 100, ADCBits: 16})
	v := ppgmodel.DefaultVitals()
	v.PulseBPM = 55
	r.run(30, v)
	off := v
	off.SensorOff = true
	r.run(5, off)
	v.PulseBPM = 130
	v.PIPct = 5
	out := r.run(8, v)
	for _, e := range out[5:] {
		if math.IsNaN(e.PulseBPM) || math.Abs(e.PulseBPM-130) > 3 {
			t.Errorf("%d s after the sensor is back: pulse %.1f (%v), want 130", e.Second-34, e.PulseBPM, e.Flags)
		}
	}
}

// TestStepPairMatchesStep: the interleaved two-channel band-pass gives
// bit-identical outputs to stepping each channel on its own (the filter
// as designed; common practice for a rewrite kept for speed).
func TestStepPairMatchesStep(t *testing.T) {
	a1, b1 := newBandPass(0.5, 5, 100), newBandPass(0.5, 5, 100)
	a2, b2 := a1, b1
	a1.settle(30000)
	b1.settle(40000)
	a2.settle(30000)
	b2.settle(40000)
	for k := range 5000 {
		x, y := 30000+500*math.Sin(float64(k)/9), 40000+300*math.Cos(float64(k)/7)
		u1, v1 := a1.step(x), b1.step(y)
		u2, v2 := stepPair(&a2, &b2, x, y)
		if math.Float64bits(u1) != math.Float64bits(u2) || math.Float64bits(v1) != math.Float64bits(v2) {
			t.Fatalf("sample %d: pair %v %v, single %v %v", k, u2, v2, u1, v1)
		}
	}
}
