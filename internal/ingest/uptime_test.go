package ingest

import (
	"math"
	"testing"
	"time"
)

// Uptime counts only the part of each window since the device was first
// seen (issue 15). Check values are plain arithmetic on the spans given
// (common practice: share = time up / time observed).
func TestUptimeShareFirstSeenInsideWindow(t *testing.T) {
	const now = int64(10_000_000_000)
	cases := []struct {
		name      string
		on        []span
		firstSeen int64
		window    time.Duration
		want      float64
		covered   bool
	}{
		// Connected for all of its 40 s of existence: 100 % over 1 h and
		// 24 h, not 40/3600 = 1.1 %.
		{"whole life, 1h", []span{{now - 40_000, now}}, now - 40_000, time.Hour, 1, true},
		{"whole life, 24h", []span{{now - 40_000, now}}, now - 40_000, 24 * time.Hour, 1, true},
		// Up 30 of the 60 s since first seen.
		{"half", []span{{now - 60_000, now - 30_000}}, now - 60_000, time.Hour, 0.5, true},
		// First seen before the window: the whole window counts; 15 min
		// up of 60 = 0.25.
		{"older than window", []span{{now - 2*3_600_000, now - 3_600_000 + 15*60_000}}, now - 2*3_600_000, time.Hour, 0.25, true},
		// First seen unknown (0): the whole window, as before.
		{"unknown first seen", []span{{now - 1_800_000, now}}, 0, time.Hour, 0.5, true},
		// First seen now: no coverage yet.
		{"no coverage", nil, now, time.Hour, 0, false},
	}
	for _, c := range cases {
		got, covered := uptimeShare(c.on, c.firstSeen, now, c.window)
		if covered != c.covered || math.Abs(got-c.want) > 1e-12 {
			t.Errorf("%s: uptimeShare = %v, %v; want %v, %v", c.name, got, covered, c.want, c.covered)
		}
	}
}
