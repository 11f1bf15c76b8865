package main

import (
	"context"
	"encoding/csv"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
	"github.com/pulsefleet/pulsefleet/internal/tune"
)

// tuneTrendCSV writes an invented 1 Hz trend (demo data): devices around
// 95 % with dips of varied depth and length and some missing cells.
func tuneTrendCSV(t *testing.T, devices, seconds int, seed uint64) string {
	t.Helper()
	r := rand.New(rand.NewPCG(seed, 9))
	var b strings.Builder
	b.WriteString("t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi\n")
	for d := range devices {
		dip, depth := 0, 0.0
		for i := range seconds {
			if dip == 0 && r.IntN(300) == 0 {
				dip, depth = 5+r.IntN(120), 3+12*r.Float64()
			}
			v := 95.5 + 0.7*r.NormFloat64()
			if dip > 0 {
				v -= depth
				dip--
			}
			cell := strconv.Itoa(int(math.Round(math.Min(100, v))))
			if r.IntN(100) == 0 {
				cell = ""
			}
			fmt.Fprintf(&b, "%d,home-%d,%s,%d,2,0.9\n", i, d+1, cell, 60+r.IntN(20))
		}
	}
	path := filepath.Join(t.TempDir(), "trend.csv")
	if err := os.WriteFile(path, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

// readCSV reads a CSV file that tune wrote: the caution line, then the
// header and rows.
func readCSV(t *testing.T, path string) [][]string {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	recs, err := csv.NewReader(strings.NewReader(afterCaution(t, path, string(b)))).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	return recs
}

func writeFile(t *testing.T, dir, name, text string) string {
	t.Helper()
	p := filepath.Join(dir, name)
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

// The episodes column of summary.csv equals what `pulsefleet replay` prints
// for each grid point's profile (written by tune under profiles/).
func TestTuneCommandAgreesWithReplay(t *testing.T) {
	in := tuneTrendCSV(t, 3, 3600, 5)
	dir := t.TempDir()
	grid := writeFile(t, dir, "grid.yaml", `
base: adult-ward-pilot
sweep:
  spo2_low.limit: [86, 90]
  spo2_low.delay: [0s, 15s, 30s]
  desaturation.limit: [3, 4]
reference:
  rule: {below: 85, for: 30s}
`)
	out := filepath.Join(dir, "out")
	code, stdout, stderr := replayRun(t, "", "tune", "--grid", grid, "--in", in, "--out", out)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	// Every output a person may keep carries the caution (docs/contracts.md,
	// "The caution on every output"): summary.csv (readCSV checks it), the
	// generated profiles, the chart, the report and the command's output.
	if !strings.Contains(stdout, caution.Text) {
		t.Errorf("stdout lacks the caution:\n%s", stdout)
	}
	profs, _ := filepath.Glob(filepath.Join(out, "profiles", "*.yaml"))
	for _, p := range profs {
		b, _ := os.ReadFile(p)
		afterCaution(t, p, string(b))
	}
	if len(profs) != 12 {
		t.Errorf("%d generated profiles, want 12", len(profs))
	}
	if b, err := os.ReadFile(filepath.Join(out, "frontier.svg")); err != nil || !strings.Contains(string(b), `class="caution"`) ||
		!strings.Contains(string(b), "NOT a certified medical alarm") {
		t.Errorf("frontier.svg lacks the caution note (%v)", err)
	}
	if b, err := os.ReadFile(filepath.Join(out, "report.html")); err != nil || !strings.Contains(string(b), caution.HTML()) {
		t.Errorf("report.html lacks the caution (%v)", err)
	}
	if strings.Contains(stderr, "\r") || !strings.Contains(stderr, "100%") {
		t.Errorf("stderr (not a terminal) should have plain progress lines ending at 100%%, got %q", stderr)
	}
	recs := readCSV(t, filepath.Join(out, "summary.csv"))
	head := recs[0]
	for i, want := range []string{"profile", "spo2_low.limit", "spo2_low.delay", "desaturation.limit", "episodes",
		"episodes_per_device_day", "time_in_alarm_pct", "sensitivity", "ppv", "median_delay_s"} {
		if head[i] != want {
			t.Fatalf("summary column %d is %q, want %q (docs/contracts.md)", i, head[i], want)
		}
	}
	if len(recs) != 1+12 {
		t.Fatalf("%d rows, want 12 grid points", len(recs)-1)
	}
	total := 0
	for _, rec := range recs[1:] {
		prof := filepath.Join(out, "profiles", rec[0]+".yaml")
		code, eps, stderr := replayRun(t, "", "replay", "--profile", prof, "--in", in)
		if code != 0 {
			t.Fatalf("replay %s: exit %d: %s", rec[0], code, stderr)
		}
		n := strings.Count(afterCaution(t, "replay output", eps), "\n") - 1
		if rec[4] != strconv.Itoa(n) {
			t.Errorf("%s: summary episodes %s, replay lists %d", rec[0], rec[4], n)
		}
		total += n
	}
	if total == 0 {
		t.Fatal("no episodes in any profile: the trend does not exercise the check")
	}
	for _, f := range []string{"frontier.svg", "report.html"} {
		if b, err := os.ReadFile(filepath.Join(out, f)); err != nil || len(b) < 1000 {
			t.Errorf("%s: %v (%d bytes)", f, err, len(b))
		}
	}
}

// Bad grids and flags get errors naming the key path and the bound.
func TestTuneCommandErrors(t *testing.T) {
	in := tuneTrendCSV(t, 1, 60, 1)
	dir := t.TempDir()
	cases := []struct {
		name, grid string
		args       []string
		code       int
		want       string
	}{
		{"negative delay", "base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [0s, 10s, -5s]\nreference:\n  rule: {below: 85, for: 60s}\n",
			nil, 1, "sweep.spo2_low.delay[2]: -5s, want >= 0"},
		{"limit out of range", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88, 101]\nreference:\n  rule: {below: 85, for: 60s}\n",
			nil, 1, "sweep.spo2_low.limit[1]: 101, want in [50, 100]"},
		{"limit under escalation", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [84]\nreference:\n  rule: {below: 85, for: 60s}\n",
			nil, 1, "sweep.spo2_low.limit[0]: 84 makes spo2_low.escalate.below: 85, want in (0, 84)"},
		{"unknown condition key", "base: adult-ward-pilot\nsweep:\n  spo2_low.limt: [88]\nreference:\n  rule: {below: 85, for: 60s}\n",
			nil, 1, "sweep.spo2_low.limt[0]: unknown key"},
		{"unknown top key", "base: adult-ward-pilot\nsweeps: {}\n", nil, 1, "sweeps (line 2): unknown key"},
		{"averaging as a sweep key", "base: adult-ward-pilot\nsweep:\n  averaging: [4s, 8s]\nreference:\n  rule: {below: 85, for: 60s}\n",
			nil, 1, "sweep.averaging (line 3): not a profile key; averaging times are the top-level key averaging: [4s, 8s, 12s]"},
		{"averaging out of bounds", "base: adult-ward-pilot\naveraging: [8s, 45s]\nreference:\n  rule: {below: 85, for: 60s}\n",
			nil, 1, `averaging[1] (line 2): "45s", want a duration in [2s, 30s]`},
		{"averaging with --in", "base: adult-ward-pilot\naveraging: [4s, 8s]\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 85, for: 60s}\n",
			nil, 1, "averaging: needs --data with raw captures"},
		{"bad rule", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 185, for: 60s}\n",
			nil, 1, "reference.rule.below (line 5): \"185\", want an SpO2 in (0, 100]"},
		{"no input", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 85, for: 60s}\n",
			[]string{"--in", ""}, 2, "--data, --gateway, --in: give exactly one"},
		{"unknown device", "base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [88]\nreference:\n  rule: {below: 85, for: 60s}\n",
			[]string{"--device", "nope"}, 1, `device "nope" has no trend`},
	}
	for i, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			g := writeFile(t, dir, fmt.Sprintf("g%d.yaml", i), c.grid)
			args := append([]string{"tune", "--grid", g, "--in", in, "--out", filepath.Join(dir, "out")}, c.args...)
			code, _, stderr := replayRun(t, "", args...)
			if code != c.code || !strings.Contains(stderr, c.want) {
				t.Errorf("exit %d, stderr %q; want exit %d and %q", code, stderr, c.code, c.want)
			}
		})
	}
}

// --data reads the store read-only with the device and time filters, and a
// store held by a running gateway is reported as such.
func TestTuneCommandStore(t *testing.T) {
	data := t.TempDir()
	db, err := store.Open(data, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	// Two devices, 1 Hz for 10 minutes from a fixed Unix time; home-1 dips
	// below 85 % for 90 s at minute 3, home-2 stays at 96 %.
	t0 := int64(1_790_000_000_000)
	var b store.Batch
	for _, dev := range []string{"home-1", "home-2"} {
		for i := range int64(600) {
			v := 96.0
			if dev == "home-1" && i >= 180 && i < 270 {
				v = 82
			}
			b.Points = append(b.Points, store.Point{Device: dev, TimeMS: t0 + i*1000, SpO2: v, Pulse: 70, PI: 2, SQI: 0.9, Source: 1})
		}
	}
	if err := db.Write(&b); err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	grid := writeFile(t, dir, "grid.yaml", "base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [0s, 30s]\nreference:\n  rule: {below: 85, for: 60s}\n")

	// Locked: the test holds the store open for writing, like a gateway.
	code, _, stderr := replayRun(t, "", "tune", "--grid", grid, "--data", data, "--out", filepath.Join(dir, "o1"))
	if code != 1 || !strings.Contains(stderr, "locked") || !strings.Contains(stderr, "gateway") {
		t.Errorf("locked store: exit %d, stderr %q; want a message that a gateway holds the store", code, stderr)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}

	from := strconv.FormatInt(t0/1000, 10)
	to := strconv.FormatInt(t0/1000+300, 10)
	out := filepath.Join(dir, "o2")
	code, stdout, stderr := replayRun(t, "", "tune", "--grid", grid, "--data", data, "--out", out,
		"--device", "home-1", "--from", from, "--to", to)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	if !strings.Contains(stdout, "over 1 devices") || !strings.Contains(stdout, "1 reference events") {
		t.Errorf("stdout %q: want 1 device and the one dip as reference event", stdout)
	}
	recs := readCSV(t, filepath.Join(out, "summary.csv"))
	// Two episodes each: spo2_low and the ward profile's desaturation
	// condition (96 -> 82 is a 14-point drop, delay 10 s). Delay 0: spo2_low
	// is announced at the dip's first sample and detects the event at once;
	// delay 30 s: announced 30 s in.
	for k, want := range []struct{ episodes, sens, delay string }{{"2", "1.0000", "0.0"}, {"2", "1.0000", "30.0"}} {
		r := recs[k+1]
		if r[2] != want.episodes || r[5] != want.sens || r[7] != want.delay {
			t.Errorf("row %d: episodes %s sensitivity %s median delay %s, want %+v", k, r[2], r[5], r[7], want)
		}
	}
}

func TestTuneCommandHelp(t *testing.T) {
	code, _, stderr := replayRun(t, "", "tune", "--help")
	if code != 0 || !strings.Contains(stderr, "--grid") || !strings.Contains(stderr, "averaging: [4s, 8s, 12s]") {
		t.Errorf("exit %d, help %q", code, stderr)
	}
}

// Averaging times re-run the estimator over the store's raw captures; every
// row of summary.csv equals replay of its profile over the re-estimated
// trend tune wrote for its averaging time.
func TestTuneCommandAveraging(t *testing.T) {
	data := t.TempDir()
	db, err := store.Open(data, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	// bed-2: 100 s of raw PPG at 50 Hz (ppgmodel, resting adult) with an
	// 8 s dip to 80 % at 60 s (invented); cot-9 streamed summaries only.
	const rate, chunk, t0 = 50, 50, int64(1_790_000_000_000)
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 21})
	b := &store.Batch{Devices: []*store.Device{{ID: "bed-2", Mode: "raw", RedNM: 660, IRNM: 940, ADCBits: 16, Calibration: "empirical"},
		{ID: "cot-9", Mode: "summary"}}}
	red, ir := make([]float64, chunk), make([]float64, chunk)
	for k := range int64(100) {
		v := ppgmodel.DefaultVitals()
		if k >= 60 && k < 68 {
			v.SpO2Pct = 80
		}
		src.Fill(red, ir, nil, v)
		rc := store.RawCapture{Device: "bed-2", Seq: uint64(k + 1), DeviceTimeMS: t0 + k*1000, RateHz: rate}
		for i := range red {
			rc.Red, rc.IR = append(rc.Red, uint32(red[i])), append(rc.IR, uint32(ir[i]))
		}
		b.Raw = append(b.Raw, rc)
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	grid := writeFile(t, dir, "grid.yaml", "base: adult-ward-pilot\naveraging: [4s, 16s]\nsweep:\n  spo2_low.limit: [88, 90]\n"+
		"  spo2_low.delay: [0s]\nreference:\n  rule: {below: 85, for: 3s}\n")
	out := filepath.Join(dir, "out")
	code, stdout, stderr := replayRun(t, "", "tune", "--grid", grid, "--data", data, "--out", out)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	if !strings.Contains(stderr, "warning: 1 of 2 devices have no raw captures and are left out: cot-9") ||
		!strings.Contains(stderr, "estimate: 1/1 units done (100%)") {
		t.Errorf("stderr %q: want the skipped device named and estimation progress", stderr)
	}
	if !strings.Contains(stdout, "4 profiles (2 averaging times x 2) over 1 devices with raw captures (of 2 in the store), 100 raw chunks") {
		t.Errorf("stdout %q: want the devices used and the chunks re-estimated", stdout)
	}
	recs := readCSV(t, filepath.Join(out, "summary.csv"))
	if len(recs) != 5 || recs[0][1] != "averaging" || recs[0][2] != "spo2_low.limit" || recs[1][1] != "4s" || recs[4][1] != "16s" {
		t.Fatalf("summary %v: want 4 rows with an averaging column first (4s, then 16s)", recs)
	}
	low := map[string]int{} // spo2_low episodes by averaging time
	for _, rec := range recs[1:] {
		trend := filepath.Join(out, "trends", "averaging-"+rec[1]+".csv")
		readCSV(t, trend) // starts with the caution line; replay reads it as is
		code, eps, stderr := replayRun(t, "", "replay", "--profile", filepath.Join(out, "profiles", rec[0]+".yaml"), "--in", trend)
		if code != 0 {
			t.Fatalf("replay %s over %s: exit %d: %s", rec[0], trend, code, stderr)
		}
		n := strings.Count(afterCaution(t, "replay output", eps), "\n") - 1
		if rec[4] != strconv.Itoa(n) {
			t.Errorf("%s (averaging %s): summary episodes %s, replay lists %d", rec[0], rec[1], rec[4], n)
		}
		low[rec[1]] += strings.Count(eps, ",spo2_low,")
	}
	// The 8 s dip is followed at 4 s and smoothed at 16 s: with no delay,
	// no more spo2_low alarms with the longer window, and some with the
	// shorter. (Other conditions may go either way: smoothing also spreads
	// the dip in time, past the desaturation condition's 10 s delay.)
	if low["4s"] == 0 || low["16s"] > low["4s"] {
		t.Errorf("spo2_low episodes %v: want some at 4s and no more at 16s", low)
	}
	if b, err := os.ReadFile(filepath.Join(out, "report.html")); err != nil || !strings.Contains(string(b), "re-estimated from 100 raw chunks") {
		t.Errorf("report.html: %v; want it to say the trends were re-estimated", err)
	}
}

// The trends tune re-estimates from raw captures at the estimator's default
// averaging time are the ones the gateway estimated live from the same
// chunks: every point at the same time with the same values (the store
// keeps float32). The simulated fleet's clocks drift and some chunks are
// sent corrupt and rejected, so the restart rules are exercised too.
// Reconnects are left out: the gateway restarts the estimator with every
// new stream, and the store does not record which stream a capture came
// from (internal/tune/doc.go, caveat).
func TestTuneReestimationMatchesLiveGateway(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	data := t.TempDir()
	c := startServe(t, data, "--capture-raw")
	start := time.Now().Add(-time.Hour).Truncate(time.Second)
	rep, err := sim.Run(context.Background(), sim.Options{Gateway: c.grpcAddr, Devices: 3, IDPrefix: "bay", Mode: sim.ModeRaw,
		RateHz: 50, Speed: 20, Duration: 3 * time.Second, Seed: 4, Start: start, ClockDriftPPM: 20000, CorruptRate: 0.03})
	if err != nil {
		t.Fatal(err)
	}
	if rep.FramesAcked == 0 || rep.UnackedAtEnd != 0 {
		t.Fatalf("simulator: %+v", rep)
	}
	if err := c.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	if err := <-c.exited; err != nil {
		t.Fatalf("serve after SIGTERM: %v\n%s", err, c.stderr)
	}
	est, err := tune.EstimateStore(context.Background(), data, tune.Filter{}, []float64{estimator.DefaultAveragingS}, tune.EstimateOptions{})
	if err != nil {
		t.Fatal(err)
	}
	db, err := store.Open(data, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	f32 := func(v float64) float64 { return float64(float32(v)) }
	same := func(a, b float64) bool { return f32(a) == b || (math.IsNaN(a) && math.IsNaN(b)) }
	valid := 0
	for _, tr := range est.Trends[0] {
		var live []store.Point
		if err := db.Trend(tr.Device, 0, math.MaxInt64/2, func(p store.Point) bool { live = append(live, p); return true }); err != nil {
			t.Fatal(err)
		}
		if len(live) != len(tr.Samples) {
			t.Errorf("%s: %d points re-estimated, %d stored live", tr.Device, len(tr.Samples), len(live))
		}
		for i := range min(len(live), len(tr.Samples)) {
			s, p := tr.Samples[i], live[i]
			if int64(math.Round(s.T*1000)) != p.TimeMS || !same(s.SpO2, p.SpO2) || !same(s.Pulse, p.Pulse) || !same(s.PI, p.PI) || !same(s.SQI, p.SQI) {
				t.Fatalf("%s point %d: re-estimated %+v, live %+v", tr.Device, i, s, p)
			}
			if p.SpO2 == p.SpO2 {
				valid++
			}
		}
	}
	if len(est.Trends[0]) != 3 || valid == 0 {
		t.Fatalf("%d devices, %d valid SpO2 points: the run did not exercise the comparison", len(est.Trends[0]), valid)
	}
	t.Logf("%d devices, %d chunks, %d restarts, %d valid SpO2 points; sim rejected %d", len(est.Trends[0]), est.Chunks, est.Restarts, valid, rep.Rejected)
}
