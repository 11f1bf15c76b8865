package estimator

import (
	"encoding/binary"
	"math"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// FuzzPush feeds arbitrary samples (including NaN, infinities, huge and
// negative values) and checks that every estimate stays well-formed: a
// value is NaN or in its physical range, SQI is in 0..1, and a real pulse
// afterwards is still measured (the filters survived).
func FuzzPush(f *testing.F) {
	f.Add([]byte{}, uint8(16), uint16(100))
	f.Add([]byte("\x00\x00\x00\x00\x00\x00\xf8\x7f"), uint8(0), uint16(30)) // a NaN
	f.Add([]byte("\x00\x00\x00\x00\x00\x00\xf0\x7f\xff\xff\xff\xff\xff\xff\xef\x7f"), uint8(12), uint16(250))
	f.Fuzz(func(t *testing.T, data []byte, bits uint8, rate uint16) {
		cfg := Config{SampleRateHz: float64(25 + int(rate)%976), ADCBits: int(bits) % 25}
		if cfg.ADCBits != 0 && cfg.ADCBits < MinADCBits {
			cfg.ADCBits = 0
		}
		st, err := New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		var x []float64
		for len(data) >= 8 {
			x = append(x, math.Float64frombits(binary.LittleEndian.Uint64(data)))
			data = data[8:]
		}
		half := len(x) / 2
		out := st.Push(x[:half], x[half:2*half], nil, nil)
		// Then 20 s of a real pulse.
		fs := 1.0
		if cfg.ADCBits > 0 {
			fs = math.Ldexp(1, cfg.ADCBits)
		}
		src := ppgmodel.New(ppgmodel.Config{SampleRateHz: cfg.SampleRateHz, ADCBits: cfg.ADCBits, Seed: 1})
		n := int(cfg.SampleRateHz) * 20
		red, ir := make([]float64, n), make([]float64, n)
		src.Fill(red, ir, nil, ppgmodel.DefaultVitals())
		out = st.Push(red, ir, nil, out)
		for _, e := range out {
			checkRange(t, e)
		}
		last := out[len(out)-1]
		if cfg.ADCBits == 0 || cfg.ADCBits >= 10 {
			if math.IsNaN(last.PulseBPM) || math.Abs(last.PulseBPM-72) > 3 {
				t.Errorf("after the junk, 20 s of pulse at 72 /min read %+v (full scale %v)", last, fs)
			}
		}
	})
}

func checkRange(t *testing.T, e Estimate) {
	t.Helper()
	in := func(v, lo, hi float64) bool { return math.IsNaN(v) || v >= lo && v <= hi }
	if !in(e.SpO2Pct, 0, 100) || !in(e.PulseBPM, 30, 300) || !in(e.PIPct, 0, math.MaxFloat64) || !in(e.Ratio, 0, math.MaxFloat64) ||
		!(e.SQI >= 0 && e.SQI <= 1) || e.Flags>>5 != 0 {
		t.Errorf("malformed estimate %+v", e)
	}
}
