package estimator

import (
	"testing"

	"github.com/pulsefleet/pulsefleet/ppgmodel"
)

// BenchmarkStream reports the estimator's cost per red/infrared sample pair
// (target <= 100 ns and no allocation; docs/references.md, "Project targets") on a
// 100 Hz, 16-bit signal pushed in 25-sample chunks as the gateway does.
func BenchmarkStream(b *testing.B) {
	const rate, chunk, seconds = 100, 25, 60
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 1})
	n := rate * seconds
	red := make([]float64, n)
	ir := make([]float64, n)
	v := ppgmodel.DefaultVitals()
	src.Fill(red, ir, nil, v)
	st, err := New(Config{SampleRateHz: rate, ADCBits: 16})
	if err != nil {
		b.Fatal(err)
	}
	out := make([]Estimate, 0, 4)
	b.ReportAllocs()
	b.ResetTimer()
	pairs := 0
	for b.Loop() {
		for i := 0; i < n; i += chunk {
			out = st.Push(red[i:i+chunk], ir[i:i+chunk], nil, out[:0])
		}
		pairs += n
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(pairs), "ns/pair")
	b.ReportMetric(0, "ns/op")
}
