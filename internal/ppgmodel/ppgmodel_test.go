package ppgmodel

import (
	"math"
	"testing"
)

// The worked values of the two-wavelength model at 660/940 nm, computed from
// Prahl's tabulation. Source: docs/references.md, "Haemoglobin absorption", seen.
func TestBeerLambertWorkedValues660940(t *testing.T) {
	m, err := NewTwoWavelength(660, 940)
	if err != nil {
		t.Fatal(err)
	}
	ratios := []struct{ s, r float64 }{
		{1.00, 0.2633}, // docs/references.md: R(S=100%) = 0.2633
		{0.97, 0.3395}, // docs/references.md: R(97%) = 0.3395
		{0.90, 0.5252}, // docs/references.md: R(90%) = 0.5252
		{0.85, 0.6652}, // docs/references.md: R(85%) = 0.6652
		{0.70, 1.1265}, // docs/references.md: R(70%) = 1.1265
		{0.00, 4.6530}, // docs/references.md: R(0%) = 4.6530
	}
	for _, c := range ratios {
		if got := m.Ratio(c.s); math.Abs(got-c.r) > 0.00005 {
			t.Errorf("R(S=%v) = %.5f, want %.4f", c.s, got, c.r)
		}
		if got := m.Saturation(c.r); math.Abs(got-c.s) > 0.0002 {
			t.Errorf("S(R=%v) = %.5f, want %v (round trip)", c.r, got, c.s)
		}
	}
	sats := []struct{ r, s float64 }{
		{0.5, 0.9093}, // docs/references.md: S(R=0.5) = 90.93%
		{1.0, 0.7391}, // docs/references.md: S(1.0) = 73.91%
		{2.0, 0.4660}, // docs/references.md: S(2.0) = 46.60%
	}
	for _, c := range sats {
		if got := m.Saturation(c.r); math.Abs(got-c.s) > 0.00005 {
			t.Errorf("S(R=%v) = %.5f, want %.4f", c.r, got, c.s)
		}
	}
}

// The empirical line, common practice (docs/references.md; Webster 1997 from
// memory): R 0.4 -> 100, 0.5 -> 97.5, 1.0 -> 85.
func TestEmpiricalLine(t *testing.T) {
	for _, c := range []struct{ r, spo2 float64 }{{0.4, 100}, {0.5, 97.5}, {0.52, 97}, {0.8, 90}, {1.0, 85}, {1.6, 70}} {
		if got := EmpiricalSpO2(c.r); math.Abs(got-c.spo2) > 1e-9 {
			t.Errorf("EmpiricalSpO2(%v) = %v, want %v", c.r, got, c.spo2)
		}
		if got := EmpiricalRatio(c.spo2); math.Abs(got-c.r) > 1e-9 {
			t.Errorf("EmpiricalRatio(%v) = %v, want %v", c.spo2, got, c.r)
		}
	}
}

func TestExtinctionInterpolatesAndRefusesOutsideTable(t *testing.T) {
	// Tabulated rows come back exactly (docs/references.md, Prahl, seen).
	o, d, err := Extinction(940)
	if err != nil || o != 1214 || d != 693.44 {
		t.Errorf("Extinction(940) = %v, %v, %v; want 1214, 693.44", o, d, err)
	}
	// Halfway between 900 (1198, 761.84) and 910 (1214, 774.56).
	o, d, err = Extinction(905)
	if err != nil || math.Abs(o-1206) > 1e-9 || math.Abs(d-768.2) > 1e-9 {
		t.Errorf("Extinction(905) = %v, %v, %v; want 1206, 768.2", o, d, err)
	}
	for _, nm := range []float64{649.9, 950.1, math.NaN(), 530} {
		if _, _, err := Extinction(nm); err == nil {
			t.Errorf("Extinction(%v): no error outside the table", nm)
		}
	}
	if _, err := NewTwoWavelength(940, 660); err == nil {
		t.Error("NewTwoWavelength(940, 660): no error for swapped wavelengths")
	}
}

func TestConfigValidateNamesField(t *testing.T) {
	for _, c := range []struct {
		cfg   Config
		field string
	}{
		{Config{SampleRateHz: 0}, "SampleRateHz"},
		{Config{SampleRateHz: 100, ADCBits: 2}, "ADCBits"},
		{Config{SampleRateHz: 100, DCLevel: 1.5}, "DCLevel"},
		{Config{SampleRateHz: 100, Relation: RelationBeerLambert, RedNM: 600}, "RedNM"},
	} {
		err := c.cfg.Validate()
		if err == nil || !contains(err.Error(), c.field) {
			t.Errorf("Validate(%+v) = %v, want an error naming %s", c.cfg, err, c.field)
		}
	}
}

func contains(s, sub string) bool {
	for i := 0; i+len(sub) <= len(s); i++ {
		if s[i:i+len(sub)] == sub {
			return true
		}
	}
	return false
}

// The generated signal carries the perfusion index and ratio it was asked
// for: AC/DC of the infrared is PI, and the red's relative swing is R times
// it (definition of the ratio of ratios; docs/references.md). The expected
// R at 90 % comes from docs/references.md, not from the model: the
// empirical line gives (110 - 90) / 25 = 0.8 (common practice); the
// Beer-Lambert model at 660/940 nm gives 610.296 / 1161.944 = 0.5252
// (computed from Prahl's table, seen).
func TestSignalCarriesPIAndRatio(t *testing.T) {
	published := map[Relation]float64{RelationEmpirical: 0.8, RelationBeerLambert: 0.5252}
	for _, rel := range []Relation{RelationEmpirical, RelationBeerLambert} {
		src := New(Config{SampleRateHz: 100, ADCBits: 0, Relation: rel, Seed: 1, NoiseRMS: -1, HRV: -1})
		v := Vitals{SpO2Pct: 90, PulseBPM: 60, PIPct: 2}
		red := make([]float64, 1000)
		ir := make([]float64, 1000)
		src.Fill(red, ir, nil, v)
		acR, dcR := swing(red[100:])
		acI, dcI := swing(ir[100:])
		pi := acI / dcI * 100
		ratio := (acR / dcR) / (acI / dcI)
		want := published[rel]
		if got := src.Truth().Ratio; math.Abs(got-want) > 0.00005 {
			t.Errorf("%v: the model's R at 90 %% is %.5f, want %.4f", rel, got, want)
		}
		// exp(-k z) swings by 1 - exp(-k) ~ k(1 - k/2): 1 % off at PI 2 %.
		if math.Abs(pi-2) > 0.05 {
			t.Errorf("%v: PI = %.3f %%, want 2 %%", rel, pi)
		}
		if math.Abs(ratio-want)/want > 0.02 {
			t.Errorf("%v: measured R = %.4f, want %.4f", rel, ratio, want)
		}
	}
}

// swing is peak-to-peak and mean.
func swing(x []float64) (pp, mean float64) {
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, v := range x {
		lo, hi = math.Min(lo, v), math.Max(hi, v)
		mean += v
	}
	return hi - lo, mean / float64(len(x))
}

func TestPulseRateFollowsVitals(t *testing.T) {
	src := New(Config{SampleRateHz: 100, Seed: 2, NoiseRMS: -1})
	ir := make([]float64, 6000)
	red := make([]float64, 6000)
	src.Fill(red, ir, nil, Vitals{SpO2Pct: 97, PulseBPM: 90, PIPct: 2})
	// Count troughs of intensity (systolic peaks) through a mid-level crossing.
	_, mean := swing(ir)
	n := 0
	for i := 1; i < len(ir); i++ {
		if ir[i-1] >= mean && ir[i] < mean {
			n++
		}
	}
	if n < 88 || n > 92 {
		t.Errorf("%d beats in 60 s, want 90 +/- 2", n)
	}
}

func TestQuantisationAndSensorOff(t *testing.T) {
	src := New(Config{SampleRateHz: 100, ADCBits: 10, Seed: 3})
	red := make([]float64, 500)
	ir := make([]float64, 500)
	amb := make([]float64, 500)
	src.Fill(red, ir, amb, Vitals{SpO2Pct: 97, PulseBPM: 70, PIPct: 2, AmbientPct: 1})
	for i := range red {
		for _, x := range []float64{red[i], ir[i], amb[i]} {
			if x != math.Floor(x) || x < 0 || x > 1023 {
				t.Fatalf("sample %d: %v is not a 10-bit code", i, x)
			}
		}
	}
	if amb[0] != 10 { // 1 % of 1024 codes, rounded
		t.Errorf("ambient = %v, want 10 codes", amb[0])
	}
	src.Fill(red, ir, nil, Vitals{SensorOff: true})
	if pp, mean := swing(ir); pp > 2 || mean > 10 {
		t.Errorf("sensor off: swing %v, mean %v codes; want room light only", pp, mean)
	}
}

func TestDeterministicFromSeed(t *testing.T) {
	gen := func(seed uint64) []float64 {
		src := New(Config{SampleRateHz: 100, ADCBits: 16, Seed: seed})
		red := make([]float64, 300)
		ir := make([]float64, 300)
		v := DefaultVitals()
		v.MotionPct = 1
		src.Fill(red, ir, nil, v)
		return append(red, ir...)
	}
	a, b, c := gen(7), gen(7), gen(8)
	same := true
	for i := range a {
		if a[i] != b[i] {
			t.Fatalf("seed 7 twice differs at %d", i)
		}
		same = same && a[i] == c[i]
	}
	if same {
		t.Error("seeds 7 and 8 gave the same samples")
	}
}

func TestFillDoesNotAllocate(t *testing.T) {
	src := New(Config{SampleRateHz: 100, ADCBits: 16, Seed: 1})
	red := make([]float64, 25)
	ir := make([]float64, 25)
	v := DefaultVitals()
	v.MotionPct = 0.5
	if a := testing.AllocsPerRun(100, func() { src.Fill(red, ir, nil, v) }); a != 0 {
		t.Errorf("Fill allocates %v times per call", a)
	}
}

// BenchmarkFill reports the cost of one red/infrared sample pair (target
// ~100-200 ns for a simulated fleet of 5,000 devices at 100 Hz on 2 cores).
func BenchmarkFill(b *testing.B) {
	for _, motion := range []float64{0, 1} {
		name := "still"
		if motion > 0 {
			name = "motion"
		}
		b.Run(name, func(b *testing.B) {
			src := New(Config{SampleRateHz: 100, ADCBits: 16, Seed: 1})
			red := make([]float64, 25)
			ir := make([]float64, 25)
			v := DefaultVitals()
			v.MotionPct = motion
			b.ReportAllocs()
			for b.Loop() {
				src.Fill(red, ir, nil, v)
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*len(red)), "ns/pair")
		})
	}
}

// A RatioFunc replaces the configured relation.
func TestRatioFuncReplacesRelation(t *testing.T) {
	src := New(Config{SampleRateHz: 100, Relation: RelationBeerLambert, RatioFunc: func(s float64) float64 { return s / 100 }})
	if r := src.Ratio(70); r != 0.7 {
		t.Errorf("Ratio(70) = %v with RatioFunc s/100, want 0.7", r)
	}
}
