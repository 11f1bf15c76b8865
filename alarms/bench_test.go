package alarms

import (
	"math"
	"math/rand/v2"
	"testing"
)

// synthTrend is an invented 1 Hz trend (demo data, not physiology): SpO2
// wandering around 95 % with dips, pulse around 75 /min, occasional gaps.
func synthTrend(n int, seed uint64) []Sample {
	r := rand.New(rand.NewPCG(seed, 1))
	s := make([]Sample, n)
	spo2, pulse := 95.0, 75.0
	dip := 0
	for i := range s {
		if dip == 0 && r.IntN(600) == 0 {
			dip = 20 + r.IntN(120)
		}
		target := 95.0
		if dip > 0 {
			target = 84
			dip--
		}
		spo2 += 0.15*(target-spo2) + r.NormFloat64()*0.7
		pulse += 0.05*(75-pulse) + r.NormFloat64()
		v := math.Round(math.Min(100, spo2))
		sm := Sample{T: float64(i), SpO2: v, Pulse: math.Round(pulse), PI: 2 + r.Float64(), SQI: 0.9}
		if r.IntN(300) == 0 {
			sm.SpO2, sm.Pulse, sm.PI, sm.SQI = math.NaN(), math.NaN(), math.NaN(), 0.1
		}
		s[i] = sm
	}
	return s
}

const benchProfileFull = `
name: full
conditions:
  - {kind: spo2_low, limit: 90, hysteresis: 2, delay: 15s, priority: medium, escalate: {below: 85, after: 60s, priority: high}, latching: true}
  - {kind: pulse_low, limit: 40, hysteresis: 5, delay: 10s, priority: medium}
  - {kind: pulse_high, limit: 130, hysteresis: 5, delay: 10s, priority: medium}
  - {kind: desaturation, limit: 4, hysteresis: 2, delay: 10s, priority: low}
  - {kind: signal_lost, delay: 30s, priority: low, escalate: {after: 120s, priority: medium}}
  - {kind: signal_poor, limit: 0.3, hysteresis: 0.1, delay: 30s, priority: low}
  - {kind: perfusion_low, limit: 0.2, hysteresis: 0.1, delay: 60s, priority: low}
  - {kind: device_offline, delay: 60s, priority: low}
`

// BenchmarkReplay measures the engine as the tuning sweep runs it: one
// engine reused across streams. ns/sample is per sample per profile. The
// synthetic trend is noisy (SpO2 SD about 1.3 points), so desaturation
// conditions start and withdraw often: a pessimistic case.
func BenchmarkReplay(b *testing.B) {
	samples := synthTrend(24*3600, 7)
	for _, bc := range []struct{ name, yaml string }{
		{"spo2_low", spo2LowProfile},
		{"desaturation", "name: d\nconditions:\n  - {kind: desaturation, limit: 3, hysteresis: 1, delay: 10s, priority: low}\n"},
		{"full", benchProfileFull},
	} {
		b.Run(bc.name, func(b *testing.B) {
			p, err := ParseProfile([]byte(bc.yaml))
			if err != nil {
				b.Fatal(err)
			}
			e, err := NewEngine(p, "bench")
			if err != nil {
				b.Fatal(err)
			}
			n := 0
			emit := func(Episode) { n++ }
			b.ReportAllocs()
			b.ResetTimer()
			for b.Loop() {
				e.Run(samples, emit)
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(len(samples)), "ns/sample")
			b.ReportMetric(float64(n)/float64(b.N), "episodes")
		})
	}
}

// The hot path does not allocate: a reused engine replays a day of 1 Hz
// trend through every kind of condition without a single allocation.
func TestRunDoesNotAllocate(t *testing.T) {
	samples := synthTrend(24*3600, 3)
	p, err := ParseProfile([]byte(benchProfileFull))
	if err != nil {
		t.Fatal(err)
	}
	e, _ := NewEngine(p, "x")
	n := 0
	emit := func(Episode) { n++ }
	e.Run(samples, emit) // warm up: the baseline window grows to its size
	if a := testing.AllocsPerRun(3, func() { e.Run(samples, emit) }); a != 0 {
		t.Errorf("Run allocates %v times per day of trend, want 0", a)
	}
	if n == 0 {
		t.Error("no episodes: the synthetic trend does not exercise the engine")
	}
}
