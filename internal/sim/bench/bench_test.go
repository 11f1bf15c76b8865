package bench

import (
	"context"
	"math"
	"testing"
	"time"

	"go.uber.org/goleak"
)

func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }

// Two identical sinks: the comparison machinery gives nothing lost, a ratio
// near one, and a measured peak for each phase. (No wall-clock assertion:
// the ratio is only checked to be positive and finite.)
func TestRunComparesPhases(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	a, b := SinkPhase(), SinkPhase()
	b.Name = "sink2"
	res, err := Run(ctx, Options{Devices: 20, Duration: time.Second, Seed: 1}, a, b)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%+v", *res)
	if len(res.Phases) != 2 || res.Lost != 0 || res.SinkSamplesPerS <= 0 || res.GatewaySamplesPerS <= 0 || res.Ratio <= 0 {
		t.Errorf("result %+v", *res)
	}
	if res.CPURatio <= 0 || math.IsInf(res.CPURatio, 0) {
		t.Errorf("cpu ratio %v, want a positive finite ratio", res.CPURatio)
	}
	if res.PeakRSSBytes <= 0 || res.SinkPeakRSSBytes <= 0 || res.GatewayPeakRSSBytes <= 0 {
		t.Errorf("peak RSS not measured: %+v", *res)
	}
	if res.UnackedAtEnd != 0 || res.Rejected != 0 {
		t.Errorf("unacknowledged %d, rejected %d against a sink", res.UnackedAtEnd, res.Rejected)
	}
}

// cpu_ratio is CPU per acknowledged sample of the system under test over
// the sink's: a sink using 1 s of CPU for 500,000 samples (2,000 ns each)
// and a gateway using 2 s for 400,000 (5,000 ns each) give 2.5.
func TestCPURatio(t *testing.T) {
	sink := PhaseResult{CPUNsPerSample: 1e9 / 500_000.0}
	gw := PhaseResult{CPUNsPerSample: 2e9 / 400_000.0}
	if got := cpuRatio(sink, gw); got != 2.5 {
		t.Errorf("cpu ratio %v, want 2.5", got)
	}
	if got := cpuRatio(PhaseResult{}, gw); got != 0 {
		t.Errorf("cpu ratio with an unmeasured sink %v, want 0", got)
	}
}

// sink_saturated: the README's runs, a quiet one (495,847 of 500,000
// samples/s acknowledged by the sink) and a saturated one (348,216).
func TestSinkSaturated(t *testing.T) {
	for _, c := range []struct {
		sink float64
		want bool
	}{{495_847, false}, {348_216, true}, {475_000, false}, {474_999, true}} {
		if got := saturated(c.sink, 500_000); got != c.want {
			t.Errorf("sink at %v of 500,000 samples/s: saturated %v, want %v", c.sink, got, c.want)
		}
	}
}
