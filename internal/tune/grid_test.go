package tune

import (
	"context"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"math"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/stats"
)

// The committed hand files (testdata/) give the same figures as the rule
// in TestHandWorkedGrid: the annotated events are the rule's two events,
// and two more fall outside the data (another device; after the trend).
func TestHandFilesWithAnnotatedEvents(t *testing.T) {
	g, err := LoadGrid(filepath.Join("testdata", "hand-grid.yaml"))
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
	res, err := Run(context.Background(), g, trends, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if res.Events != 2 || res.EventsOutside != 2 {
		t.Errorf("events %d outside %d, want 2 and 2", res.Events, res.EventsOutside)
	}
	want := []int{2, 2, 2, 2, 4, 3, 2, 2} // worked in TestHandWorkedGrid
	wantPPV := []float64{1, 1, 1, 1, 0.75, 2.0 / 3, 1, 1}
	for i, r := range res.Rows {
		if r.Episodes != want[i] || math.Abs(r.PPV-wantPPV[i]) > 1e-12 || r.Sensitivity != 1 {
			t.Errorf("%s: episodes %d ppv %v sensitivity %v, want %d %v 1", res.Points[i].Name, r.Episodes, r.PPV, r.Sensitivity, want[i], wantPPV[i])
		}
	}
	// Pareto: every point detects both events; the 2-episode points are
	// the least burden, so they (and only they) are optimal.
	for i, r := range res.Rows {
		if r.Pareto != (r.Episodes == 2) {
			t.Errorf("%s: pareto %v with %d episodes", res.Points[i].Name, r.Pareto, r.Episodes)
		}
	}
	var b strings.Builder
	if err := WriteSummaryCSV(&b, res); err != nil {
		t.Fatal(err)
	}
	// The caution line first (docs/contracts.md, "The caution on every output").
	rest, ok := strings.CutPrefix(b.String(), caution.Comment)
	lines := strings.Split(strings.TrimSpace(rest), "\n")
	if !ok || len(lines) != 9 || !strings.HasPrefix(lines[5], "hand-g5,90,0s,0,4,") {
		t.Errorf("summary:\n%s", b.String())
	}
}

func TestGridErrors(t *testing.T) {
	const ref = "reference:\n  rule: {below: 85, for: 60s}\n"
	cases := []struct{ name, grid, want string }{
		{"empty", "", "empty document"},
		{"no base", "sweep:\n  spo2_low.limit: [88]\n" + ref, "base: missing"},
		{"no reference", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\n", "reference: missing"},
		{"unknown base file", "base: nope.yaml\nsweep:\n  spo2_low.limit: [88]\n" + ref, `base (line 1): "nope.yaml": no such file and no built-in profile`},
		{"inline base error", "base:\n  name: x\n  conditions:\n    - {kind: spo2_low, limit: 120, delay: 0s, priority: low}\nsweep:\n  spo2_low.limit: [88]\n" + ref,
			"base.conditions[0].limit: 120, want in [50, 100]"},
		{"no such condition", "base: adult-ward-pilot\nsweep:\n  spo2_high.limit: [95]\n" + ref, `sweep.spo2_high.limit[0]: no condition named "spo2_high"`},
		{"not a list", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: 88\n" + ref, "sweep.spo2_low.limit (line 3): want a list"},
		{"empty list", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: []\n" + ref, "sweep.spo2_low.limit (line 3): empty list"},
		{"repeated value", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88, 90, 88]\n" + ref, "sweep.spo2_low.limit[2] (line 3): 88 repeats sweep.spo2_low.limit[0]"},
		{"bad duration", "base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [10s, soon]\n" + ref, `sweep.spo2_low.delay[1]: "soon", want a duration`},
		{"delay over bound", "base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [11m]\n" + ref, "sweep.spo2_low.delay[0]: 11m0s, want <= 10m0s"},
		{"escalation above limit", "base: adult-ward-pilot\nsweep:\n  spo2_low.escalate.below: [80, 95]\n" + ref, "sweep.spo2_low.escalate.below[1]: 95, want in (0, 90)"},
		{"name not sweepable", "base: adult-ward-pilot\nsweep:\n  name: [a, b]\n" + ref, "sweep.name (line 3): cannot be swept"},
		// Averaging bounds are the estimator's (estimator.MinAveragingS, MaxAveragingS).
		{"averaging below bound", "base: adult-ward-pilot\naveraging: [4s, 1s]\n" + ref, `averaging[1] (line 2): "1s", want a duration in [2s, 30s]`},
		{"averaging above bound", "base: adult-ward-pilot\naveraging: [31s]\n" + ref, `averaging[0] (line 2): "31s", want a duration in [2s, 30s]`},
		{"averaging not a duration", "base: adult-ward-pilot\naveraging: [8]\n" + ref, `averaging[0] (line 2): "8", want a duration`},
		{"averaging not a list", "base: adult-ward-pilot\naveraging: 8s\n" + ref, "averaging (line 2): want a list of averaging times"},
		{"averaging empty", "base: adult-ward-pilot\naveraging: []\n" + ref, "averaging (line 2): want a list of averaging times"},
		{"averaging repeated", "base: adult-ward-pilot\naveraging: [8s, 4s, 8000ms]\n" + ref, "averaging[2] (line 2): 8000ms repeats averaging[0]"},
		{"averaging as sweep key", "base: adult-ward-pilot\nsweep:\n  estimator.averaging: [4s, 8s]\n" + ref,
			"sweep.estimator.averaging (line 3): not a profile key; averaging times are the top-level key averaging: [4s, 8s, 12s]"},
		{"averaging_times", "base: adult-ward-pilot\naveraging_times: [4s]\n" + ref, "averaging_times (line 2): unknown key; averaging times are the top-level key averaging"},
		{"no sweep nor averaging", "base: adult-ward-pilot\n" + ref, "sweep: missing"},
		{"duplicate key", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\n  spo2_low.limit: [90]\n" + ref, "sweep.spo2_low.limit: duplicate key (line 4)"},
		{"rule and file", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 85, for: 60s}\n  file: testdata/hand-events.csv\n", "reference: more than one of rule, file and reviews"},
		{"rule incomplete", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 85}\n", "want both below and for"},
		{"rule negative for", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 85, for: -1s}\n", `reference.rule.for (line 5): "-1s", want a duration in [0, 24h]`},
		{"grace over bound", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 85, for: 60s}\n  grace: 2h\n", `reference.grace (line 6): "2h", want a duration in [0, 1h]`},
		{"unknown scored condition", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 85, for: 60s}\n  conditions: [spo2_lo]\n",
			`reference.conditions[0] (line 6): "spo2_lo", want a condition of the base profile adult-ward-pilot`},
		{"no spo2_low to score", "base:\n  name: x\n  conditions:\n    - {kind: pulse_low, limit: 40, delay: 0s, priority: low}\nsweep:\n  pulse_low.limit: [35, 40]\n" + ref,
			"reference.conditions: missing, and base profile x has no spo2_low condition"},
		{"events file missing", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  file: nope.csv\n", "reference.file (line 5)"},
		{"too many points", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [86,87,88,89,90,91,92,93,94,95]\n  spo2_low.delay: [0s,1s,2s,3s,4s,5s,6s,7s,8s,9s]\n  spo2_low.hysteresis: [0,1,2,3,4,5,6,7,8,9]\n  desaturation.limit: [3,4,5,6,7,8,9,10,11,12]\n  pulse_low.limit: [30,40]\n" + ref,
			"sweep: more than 10000 grid points"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := ParseGrid([]byte(c.grid), ".")
			if err == nil || !strings.Contains(err.Error(), c.want) {
				t.Errorf("error %v, want it to contain %q", err, c.want)
			}
		})
	}
}

// Swept keys may depend on each other: a limit below the base's escalation
// depth is valid once the escalation depth is swept lower too, whatever the
// order of the keys in the file; a combination that stays invalid names
// the grid point.
func TestGridDependentKeys(t *testing.T) {
	for _, order := range []string{
		"  spo2_low.limit: [82, 90]\n  spo2_low.escalate.below: [80]\n",
		"  spo2_low.escalate.below: [80]\n  spo2_low.limit: [82, 90]\n",
	} {
		g, err := ParseGrid([]byte("base: adult-ward-pilot\nsweep:\n"+order+"reference:\n  rule: {below: 85, for: 60s}\n"), ".")
		if err != nil {
			t.Fatalf("%q: %v", order, err)
		}
		pts, _ := g.Points()
		c := pts[0].Profile.Condition("spo2_low")
		if len(pts) != 2 || c.Escalate.Below != 80 || (c.Limit != 82 && c.Limit != 90) {
			t.Errorf("%q: points %d, first spo2_low %+v", order, len(pts), c)
		}
	}
	_, err := ParseGrid([]byte("base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [82, 90]\n  spo2_low.escalate.below: [80, 84]\nreference:\n  rule: {below: 85, for: 60s}\n"), ".")
	want := "sweep.spo2_low.escalate.below[1]: 84, want in (0, 82) (line 4) in grid point spo2_low.limit=82, spo2_low.escalate.below=84"
	if err == nil || err.Error() != want {
		t.Errorf("error %v, want %q", err, want)
	}
}

func TestReadEventsCSV(t *testing.T) {
	ev, err := ReadEventsCSV(strings.NewReader("label,device,start_s,end_s,extra\nx,bed-1,10,70,\n,bed-2,5.5,6,\n"))
	if err != nil || len(ev) != 2 || ev[0] != (Event{"bed-1", 10, 70, "x"}) || ev[1].Start != 5.5 {
		t.Fatalf("%+v %v", ev, err)
	}
	for _, c := range []struct{ in, want string }{
		{"", "empty input"},
		{"device,start_s\n", "no end_s column"},
		{"device,start_s,end_s\na,1,x\n", `line 2: end_s "x", want a finite number`},
		{"device,start_s,end_s\na,5,5\n", "line 2: end_s 5, want after start_s 5"},
		{"device,start_s,end_s\na,NaN,5\n", `line 2: start_s "NaN"`},
	} {
		if _, err := ReadEventsCSV(strings.NewReader(c.in)); err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%q: error %v, want %q", c.in, err, c.want)
		}
	}
}

func TestRuleEvents(t *testing.T) {
	s := func(t float64, v float64) alarms.Sample { return alarms.Sample{T: t, SpO2: v} }
	nan := math.NaN()
	samples := []alarms.Sample{s(0, 90), s(1, 84), s(2, nan), s(3, 84), s(4, 85), // 1..4: 3 s
		s(5, 80), s(10, 80), s(11, 0), s(12, 99), // 5..12: 7 s (0 is "no reading", missing)
		s(13, 70), s(20, 70)} // open at the end: 13..20
	got := RuleEvents("d", samples, Rule{Below: 85, For: 3e9})
	want := []Event{{"d", 1, 4, "rule"}, {"d", 5, 12, "rule"}, {"d", 13, 20, "rule"}}
	if len(got) != len(want) {
		t.Fatalf("%+v, want %+v", got, want)
	}
	for i := range want {
		if got[i] != want[i] {
			t.Errorf("event %d %+v, want %+v", i, got[i], want[i])
		}
	}
	if got := RuleEvents("d", samples, Rule{Below: 85, For: 4e9}); len(got) != 2 {
		t.Errorf("for 4 s: %+v, want the 7 s events only", got)
	}
}

func TestFilterTrends(t *testing.T) {
	tr := handTrends()
	got, err := FilterTrends(tr, Filter{Devices: []string{"b"}, From: 3, HasFrom: true, To: 14, HasTo: true})
	if err != nil || len(got) != 1 || got[0].Device != "b" || len(got[0].Samples) != 11 || got[0].Samples[0].T != 3 {
		t.Fatalf("%+v %v", got, err)
	}
	if _, err := FilterTrends(tr, Filter{Devices: []string{"zz"}}); err == nil || !strings.Contains(err.Error(), `device "zz" has no trend`) {
		t.Errorf("unknown device: %v", err)
	}
	if _, err := FilterTrends(tr, Filter{From: 5, HasFrom: true, To: 5, HasTo: true}); err == nil {
		t.Error("empty range accepted")
	}
	got, _ = FilterTrends(tr, Filter{From: 30, HasFrom: true})
	if len(got) != 1 || got[0].Device != "a" {
		t.Errorf("from 30: %+v, want only a (b ends at 20)", got)
	}
}

func TestQuantileAndCoverage(t *testing.T) {
	if m := stats.Median([]float64{4, 1, 3, 2}); m != 2.5 {
		t.Errorf("median %v, want 2.5", m)
	}
	if q := stats.Quantile(0.9, []float64{0, 10, 20, 30, 40, 50, 60, 70, 80, 90, 100}); q != 90 {
		t.Errorf("p90 %v, want 90", q)
	}
	if !math.IsNaN(stats.Median(nil)) {
		t.Error("median of nothing is not NaN")
	}
	// Alarms [0,10) [5,20) [30,40); monitored [2,8) [15,35): 6 + 5 + 5 = 16.
	ivs := [][2]float64{{30, 40}, {0, 10}, {5, 20}}
	if c := coveredTime(ivs, [][2]float64{{2, 8}, {15, 35}}); c != 16 {
		t.Errorf("covered %v, want 16", c)
	}
}

func TestProgressReported(t *testing.T) {
	g, err := ParseGrid([]byte(handGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	var mu sync.Mutex
	var calls [][2]int
	_, err = Run(context.Background(), g, handTrends(), Options{Progress: func(done, total int) {
		mu.Lock()
		calls = append(calls, [2]int{done, total})
		mu.Unlock()
	}})
	if err != nil {
		t.Fatal(err)
	}
	last := calls[len(calls)-1]
	if calls[0][0] != 0 || last[0] != last[1] || last[1] == 0 {
		t.Errorf("progress calls %v, want from 0 to total", calls)
	}
}

func TestRunCancelled(t *testing.T) {
	g, err := ParseGrid([]byte(handGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := Run(ctx, g, handTrends(), Options{}); err == nil {
		t.Error("cancelled run returned no error")
	}
}

// Averaging times are the slowest-varying column, first after profile;
// the profile keys vary within each, and a grid may sweep averaging alone.
func TestGridAveraging(t *testing.T) {
	const ref = "reference:\n  rule: {below: 85, for: 60s}\n"
	g, err := ParseGrid([]byte("base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [0s, 15s]\naveraging: [12s, 4s]\n"+ref), ".")
	if err != nil {
		t.Fatal(err)
	}
	if !g.HasAveraging() || len(g.Sweep) != 2 || g.Sweep[0].Key != AveragingKey || g.Size() != 4 {
		t.Fatalf("sweep %+v, size %d: want averaging first and 2 x 2 points", g.Sweep, g.Size())
	}
	if cols := SummaryColumns(g); cols[1] != "averaging" || cols[2] != "spo2_low.delay" {
		t.Errorf("summary columns %v, want profile, averaging, spo2_low.delay, ...", cols[:3])
	}
	pts, err := g.Points()
	if err != nil {
		t.Fatal(err)
	}
	want := []struct {
		avg   string
		avgS  float64
		delay string
	}{{"12s", 12, "0s"}, {"12s", 12, "15s"}, {"4s", 4, "0s"}, {"4s", 4, "15s"}}
	for i, w := range want {
		p := pts[i]
		if p.Values[0] != w.avg || p.AveragingS != w.avgS || p.Values[1] != w.delay || p.Profile.Condition("spo2_low").Delay.String() != w.delay {
			t.Errorf("point %d: values %v, averaging %v s, profile delay %v; want %s (%v s), %s", i, p.Values, p.AveragingS,
				p.Profile.Condition("spo2_low").Delay, w.avg, w.avgS, w.delay)
		}
	}
	// Averaging alone: one point per averaging time, each the base profile.
	g, err = ParseGrid([]byte("base: adult-ward-pilot\naveraging: [4s, 8s]\n"+ref), ".")
	if err != nil {
		t.Fatal(err)
	}
	if pts, err := g.Points(); err != nil || len(pts) != 2 || pts[1].AveragingS != 8 {
		t.Fatalf("averaging alone: %d points (%v), want 2", len(pts), err)
	}
	// A trend cannot be re-estimated.
	if _, err := Run(context.Background(), g, handTrends(), Options{}); err == nil ||
		!strings.Contains(err.Error(), "averaging (line 2): needs raw captures") {
		t.Errorf("Run with averaging over trends: %v, want averaging (line 2): needs raw captures", err)
	}
}
