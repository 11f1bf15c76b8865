package estimator_test

import (
	"fmt"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// A device streaming 100 Hz, 16-bit red/infrared samples in 25-sample
// chunks: one Stream per device, one estimate per second.
func ExampleStream() {
	st, err := estimator.New(estimator.Config{SampleRateHz: 100, ADCBits: 16})
	if err != nil {
		panic(err)
	}
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: 100, ADCBits: 16, Seed: 1})
	vitals := ppgmodel.Vitals{SpO2Pct: 93, PulseBPM: 84, PIPct: 1.5, RespRateBPM: 14, RespWanderPct: 1}
	red, ir := make([]float64, 25), make([]float64, 25)
	out := make([]estimator.Estimate, 0, 1)
	var last estimator.Estimate
	for chunk := 0; chunk < 4*20; chunk++ { // 20 s
		src.Fill(red, ir, nil, vitals)
		out = st.Push(red, ir, nil, out[:0])
		for _, e := range out {
			last = e
		}
	}
	fmt.Printf("second %d: SpO2 %.0f %%, pulse %.0f /min, PI %.1f %%, flags %q\n",
		last.Second, last.SpO2Pct, last.PulseBPM, last.PIPct, last.Flags)
	// Output: second 19: SpO2 93 %, pulse 84 /min, PI 1.5 %, flags ""
}
