package estimator

import (
	"math"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// Every ratio method must meet the synthetic acceptance of the default
// (project acceptance, as TestDesaturationAccuracy: Arms <= 1.0 % at 16
// bits/100 Hz, a value on >= 95 % of settled seconds): on a clean pulse the
// slope of the differenced channels, and the cross-spectrum at the pulse
// harmonics, equal the slope of the channels.
func TestRatioMethodsDesaturationAccuracy(t *testing.T) {
	arms := map[RatioMethod]float64{}
	for _, m := range RatioMethods {
		for seed := uint64(1); seed <= 3; seed++ {
			sc := scenario{
				rate: 100, bits: 16, relation: ppgmodel.RelationEmpirical, cal: Empirical(),
				plateauS: 60, rampS: 10, levels: desaturation(), seed: seed,
				respPct: 1, shape: ppgmodel.Shape(seed % 2), ratio: m,
			}
			a := score(sc.run(t), settleS)
			arms[m] += a.armsPct * a.armsPct / 3
			if !(a.armsPct <= 1.0) {
				t.Errorf("%s, seed %d: Arms %.2f %%, want <= 1.0 %%", m, seed, a.armsPct)
			}
			if !(a.reportShare >= 0.95) {
				t.Errorf("%s, seed %d: SpO2 on %.1f %% of seconds, want >= 95 %%", m, seed, 100*a.reportShare)
			}
		}
	}
	// Logged for the README's comparison of the methods.
	t.Logf("stepped desaturation, 3 seeds: Arms %.3f %% (beat slope), %.3f %% (derivative), %.3f %% (spectral)",
		math.Sqrt(arms[RatioBeatSlope]), math.Sqrt(arms[RatioDerivativeSlope]), math.Sqrt(arms[RatioSpectral]))
}

// Same motion acceptance as TestMotionBurstsDoNotGiveConfidentWrongValues
// (<= 2 % of motion seconds confident and > 6 points off) with every ratio
// method.
func TestRatioMethodsMotionBursts(t *testing.T) {
	for _, m := range RatioMethods {
		var tot motionScore
		for seed := uint64(1); seed <= 6; seed++ {
			sc := scenario{rate: 100, bits: 16, plateauS: 30, rampS: 0.001, levels: motionBursts(int(seed)), seed: seed, respPct: 1, ratio: m}
			s := scoreMotion(sc, sc.run(t))
			tot.seconds += s.seconds
			tot.confidentWrong += s.confidentWrong
		}
		share := float64(tot.confidentWrong) / float64(tot.seconds)
		t.Logf("%s: %d motion seconds, confident and wrong %.2f %%", m, tot.seconds, 100*share)
		if share > 0.02 {
			t.Errorf("%s: %.2f %% of motion seconds confident and > 6 points off, want <= 2 %%", m, 100*share)
		}
	}
}

func TestRatioMethodValidated(t *testing.T) {
	_, err := New(Config{SampleRateHz: 100, Ratio: "peak-valley"})
	if err == nil || !strings.Contains(err.Error(), "Ratio") {
		t.Errorf("unknown ratio method: error %v, want one naming Ratio", err)
	}
	for _, m := range append(RatioMethods, "") {
		if _, err := New(Config{SampleRateHz: 100, Ratio: m}); err != nil {
			t.Errorf("ratio method %q: %v", m, err)
		}
	}
}

// The spectral method keeps the window's samples in rings sized at New: Push
// still does not allocate (docs/references.md, "Project targets", as
// TestPushDoesNotAllocate).
func TestRatioMethodsPushDoesNotAllocate(t *testing.T) {
	const rate = 100
	for _, m := range RatioMethods {
		src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 7})
		st, _ := New(Config{SampleRateHz: rate, ADCBits: 16, Ratio: m})
		red, ir := make([]float64, 25), make([]float64, 25)
		out := make([]Estimate, 0, 2)
		v := ppgmodel.DefaultVitals()
		for k := 0; k < 400; k++ {
			src.Fill(red, ir, nil, v)
			out = st.Push(red, ir, nil, out[:0])
		}
		allocs := testing.AllocsPerRun(400, func() {
			src.Fill(red, ir, nil, v)
			out = st.Push(red, ir, nil, out[:0])
		})
		if allocs != 0 {
			t.Errorf("%s: Push allocates %v times per 25-sample chunk", m, allocs)
		}
	}
}

// BenchmarkStreamRatioMethods is BenchmarkStream for each ratio method
// (100 Hz, 16 bit, 25-sample chunks): the spectral method adds one pass
// over the window per second.
func BenchmarkStreamRatioMethods(b *testing.B) {
	const rate, chunk, seconds = 100, 25, 60
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 1})
	n := rate * seconds
	red, ir := make([]float64, n), make([]float64, n)
	src.Fill(red, ir, nil, ppgmodel.DefaultVitals())
	for _, m := range RatioMethods {
		b.Run(string(m), func(b *testing.B) {
			st, err := New(Config{SampleRateHz: rate, ADCBits: 16, Ratio: m})
			if err != nil {
				b.Fatal(err)
			}
			out := make([]Estimate, 0, 4)
			b.ReportAllocs()
			pairs := 0
			cpu0 := cpuTime()
			for b.Loop() {
				for i := 0; i < n; i += chunk {
					out = st.Push(red[i:i+chunk], ir[i:i+chunk], nil, out[:0])
				}
				pairs += n
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(pairs), "ns/pair")
			b.ReportMetric(float64((cpuTime()-cpu0).Nanoseconds())/float64(pairs), "cpu-ns/pair")
			b.ReportMetric(0, "ns/op")
		})
	}
}
