package ingest

import (
	"context"
	"log/slog"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/goleak"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Every goroutine a test starts (writers, streams) must be gone when the
// package's tests end.
func TestMain(m *testing.M) {
	goleak.VerifyTestMain(m)
}

// testConfig is a pipeline's configuration as the gateway gives it with
// its defaults, over db, with the clock now, the batch delay and the
// stream limits given.
func testConfig(db *store.DB, now func() time.Time, batchDelay time.Duration, lim Limits) Config {
	return Config{
		Store: db, Registerer: prometheus.NewRegistry(), Log: slog.New(slog.DiscardHandler), Now: now,
		BatchDelay: batchDelay, BatchRecords: 4096, MaxChunkSamples: 1000, MaxMessageBytes: DefaultMaxMessageBytes(1000),
		LateAfter: 10 * time.Second, SendStall: DefaultSendStall,
		Limits:    func() Limits { return lim },
		Owner:     func(string) string { return "" },
		Authorize: func(context.Context, string) error { return nil },
		Calibration: func(_, _, ref string, redNM, irNM float64) (estimator.Calibration, string, error) {
			return calibration.Resolve(ref, redNM, irNM, nil)
		},
	}
}

// testProfile is a fast profile: spo2_low at 90 with a 3 s delay.
func testProfile(t testing.TB) *alarms.Profile {
	p, err := alarms.ParseProfile([]byte(`name: test-fast
conditions:
  - kind: spo2_low
    limit: 90
    hysteresis: 2
    delay: 3s
    priority: medium
    escalate: {below: 80, priority: high}
  - kind: pulse_high
    limit: 130
    delay: 5s
    priority: low
`))
	if err != nil {
		t.Fatal(err)
	}
	return p
}
