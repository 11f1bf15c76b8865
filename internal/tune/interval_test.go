package tune

import (
	"context"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"pgregory.net/rapid"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// sweepBothWays runs g over trends with the interval shortcut and with
// the engine alone, and fails t unless every variant's episodes and every
// summary row are identical.
func sweepBothWays(t interface {
	Helper()
	Fatalf(string, ...any)
}, g *Grid, trends []alarms.Trend) *Result {
	t.Helper()
	fast, err := Run(context.Background(), g, trends, Options{Workers: 2})
	if err != nil {
		t.Fatalf("interval sweep: %v", err)
	}
	slow, err := Run(context.Background(), g, trends, Options{Workers: 2, engineOnly: true})
	if err != nil {
		t.Fatalf("engine sweep: %v", err)
	}
	same := func(a, b float64) bool { return a == b || (a != a && b != b) }
	for v := range slow.spans {
		for d := range slow.spans[v] {
			a, b := fast.spans[v][d], slow.spans[v][d]
			if len(a) != len(b) {
				t.Fatalf("variant %d device %d: %d episodes by intervals, %d by the engine", v, d, len(a), len(b))
			}
			for i := range a {
				x, y := a[i], b[i]
				if x.cond != y.cond || x.prio0 != y.prio0 || x.prio != y.prio || !same(x.onset, y.onset) || !same(x.ann, y.ann) || !same(x.esc, y.esc) || !same(x.end, y.end) {
					t.Fatalf("variant %d device %d episode %d: %+v by intervals, %+v by the engine", v, d, i, x, y)
				}
			}
		}
	}
	for i := range slow.Rows {
		if a, b := fmt.Sprintf("%v", fast.Rows[i]), fmt.Sprintf("%v", slow.Rows[i]); a != b {
			t.Fatalf("row %d: %s by intervals, %s by the engine", i, a, b)
		}
	}
	return fast
}

// TestIntervalSweepAgreesOnHandWorkedGrids: the hand-worked grids (whose
// counts TestHandWorkedGrid and TestHandFilesWithAnnotatedEvents check by
// hand) and the ward-profile grid give identical episodes and summaries
// both ways.
func TestIntervalSweepAgreesOnHandWorkedGrids(t *testing.T) {
	g, err := ParseGrid([]byte(handGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	sweepBothWays(t, g, handTrends())

	hg, err := LoadGrid(filepath.Join("testdata", "hand-grid.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(filepath.Join("testdata", "hand-trend.csv"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	trends, err := alarms.ReadTrendCSV(f)
	if err != nil {
		t.Fatal(err)
	}
	sweepBothWays(t, hg, trends)

	wg, err := ParseGrid([]byte(agreeGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	sweepBothWays(t, wg, cohort(cohortOptions{Devices: 4, Hours: 0.5, Seed: 5, DipsPerHour: 12, MissingPct: 3}))
}

// TestIntervalSweepAgreesOnRandomGrids: random threshold conditions
// (every sample-driven kind but desaturation, which always takes the
// engine), random swept limits, hysteresis, delays, escalations and
// latching, over random trends with missing values and out-of-range
// cells, give identical episodes and summaries both ways.
func TestIntervalSweepAgreesOnRandomGrids(t *testing.T) {
	rapid.Check(t, func(rt *rapid.T) {
		type kind struct {
			name       string
			limits     []string
			escKey     string
			escDepths  []string
			hysteresis []string
		}
		kinds := []kind{
			{"spo2_low", []string{"85", "88", "90", "92.5"}, "below", []string{"80", "84"}, []string{"0", "1", "2.5"}},
			{"pulse_high", []string{"100", "120"}, "above", []string{"140"}, []string{"0", "5"}},
			{"pulse_low", []string{"50", "60"}, "below", []string{"40"}, []string{"0", "5"}},
			{"perfusion_low", []string{"0.5", "1"}, "", nil, []string{"0", "0.3"}},
			{"signal_poor", []string{"0.4", "0.6"}, "", nil, []string{"0", "0.1"}},
			{"spo2_high", []string{"97", "99"}, "above", []string{"99.5"}, []string{"0", "1"}},
			{"signal_lost", []string{"0"}, "", nil, []string{"0"}},
		}
		k := rapid.SampledFrom(kinds).Draw(rt, "kind")
		var base strings.Builder
		fmt.Fprintf(&base, "base:\n  name: rnd\n  conditions:\n    - {kind: %s, ", k.name)
		if k.name != "signal_lost" {
			fmt.Fprintf(&base, "limit: %s, hysteresis: %s, ", k.limits[0], k.hysteresis[0])
		}
		fmt.Fprintf(&base, "delay: 10s, priority: low")
		if k.escKey != "" && rapid.Bool().Draw(rt, "esc") {
			fmt.Fprintf(&base, ", escalate: {%s: %s, after: 60s, priority: high}", k.escKey, k.escDepths[0])
		} else if rapid.Bool().Draw(rt, "escAfter") {
			fmt.Fprintf(&base, ", escalate: {after: 30s, priority: high}")
		}
		base.WriteString("}\n")
		base.WriteString("sweep:\n")
		pick := func(label string, from []string) string {
			n := rapid.IntRange(1, len(from)).Draw(rt, label+"n")
			return "[" + strings.Join(from[:n], ", ") + "]"
		}
		if k.name != "signal_lost" {
			fmt.Fprintf(&base, "  %s.limit: %s\n", k.name, pick("limit", k.limits))
			fmt.Fprintf(&base, "  %s.hysteresis: %s\n", k.name, pick("hyst", k.hysteresis))
		}
		fmt.Fprintf(&base, "  %s.delay: %s\n", k.name, pick("delay", []string{"0s", "1s", "3s", "10s", "15.5s", "30s", "120s"}))
		if rapid.Bool().Draw(rt, "latching") {
			fmt.Fprintf(&base, "  %s.latching: [false, true]\n", k.name)
		}
		base.WriteString("reference:\n  rule: {below: 88, for: 10s}\n  conditions: [" + k.name + "]\n")
		g, err := ParseGrid([]byte(base.String()), ".")
		if err != nil {
			rt.Fatalf("grid %s: %v", base.String(), err)
		}
		// Random trends: irregular times (some decimal), values around the
		// limits, missing and out-of-range cells.
		var trends []alarms.Trend
		for d := range rapid.IntRange(1, 3).Draw(rt, "devices") {
			tr := alarms.Trend{Device: fmt.Sprint("r", d)}
			tm := rapid.Float64Range(0, 1e9).Draw(rt, "t0")
			for range rapid.IntRange(0, 300).Draw(rt, "samples") {
				tm += rapid.SampledFrom([]float64{1, 1, 1, 0.1, 0.5, 2.5, 7, 61}).Draw(rt, "dt")
				val := func(label string, lo, hi float64) float64 {
					switch rapid.IntRange(0, 9).Draw(rt, label+"kind") {
					case 0:
						return math.NaN()
					case 1:
						return -1
					}
					return rapid.Float64Range(lo, hi).Draw(rt, label)
				}
				tr.Samples = append(tr.Samples, alarms.Sample{T: tm, SpO2: val("spo2", 78, 100), Pulse: val("pulse", 35, 150), PI: val("pi", 0, 2), SQI: val("sqi", 0, 1)})
			}
			trends = append(trends, tr)
		}
		sweepBothWays(rt, g, trends)
	})
}
