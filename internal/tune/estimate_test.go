package tune

import (
	"bytes"
	"context"
	"math"
	"slices"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
	"github.com/pulsefleet/pulsefleet/internal/stats"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

const (
	rawRate  = 50      // Hz
	rawChunk = 25      // samples per chunk: 0.5 s
	rawBits  = 16      // ADC bits
	rawT0MS  = 1.79e12 // device clock of the first sample (Unix ms, Sep 2026)
)

// dipVitals is a resting adult (ppgmodel defaults, SpO2 97 %) with one
// brief desaturation starting at dipS: down to 80 % over 2 s, 4 s there,
// back over 2 s; 8 s in all, about 6 s below 90 % (invented, the shape of a
// short obstructive dip).
func dipVitals(t, dipS float64) ppgmodel.Vitals {
	v := ppgmodel.DefaultVitals()
	v.SpO2Pct = 97
	switch x := t - dipS; {
	case x < 0 || x >= 8:
	case x < 2:
		v.SpO2Pct = 97 - 17*x/2
	case x < 6:
		v.SpO2Pct = 80
	default:
		v.SpO2Pct = 80 + 17*(x-6)/2
	}
	return v
}

// rawCaptures generates seconds of raw chunks for device from src,
// following vitals(t); the chunk at skipAt (if >= 0) is lost: its samples
// and its sequence number are missing, though the device clock moves on by
// only 0.5 s (too little for a clock jump).
func rawCaptures(device string, src *ppgmodel.Source, seconds int, skipAt int, vitals func(t float64) ppgmodel.Vitals) []store.RawCapture {
	var out []store.RawCapture
	red, ir := make([]float64, rawChunk), make([]float64, rawChunk)
	seq := uint64(1)
	for k := range seconds * rawRate / rawChunk {
		t := float64(k*rawChunk) / rawRate
		src.Fill(red, ir, nil, vitals(t))
		if k == skipAt {
			seq++
			continue
		}
		c := store.RawCapture{Device: device, Seq: seq, DeviceTimeMS: int64(rawT0MS) + int64(k*rawChunk*1000/rawRate), RateHz: rawRate,
			Red: make([]uint32, rawChunk), IR: make([]uint32, rawChunk)}
		for i := range red {
			c.Red[i], c.IR[i] = uint32(red[i]), uint32(ir[i])
		}
		out = append(out, c)
		seq++
	}
	return out
}

// rawStore writes the test fleet into a new store in a temporary directory
// and returns the directory:
//   - ward-3 (empirical line) and ward-4 (a stored curve equal to that line)
//     carry the same 200 s with one dip at 120 s, and a lost chunk at 30 s;
//   - ward-5 (Beer-Lambert at 660/940 nm, as the gateway records it) carries
//     120 s at a steady 97 % from a source driven by that model;
//   - home-7 streamed summaries only: no raw captures.
func rawStore(t *testing.T) string {
	t.Helper()
	dir := t.TempDir()
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	// The empirical line as a fitted curve (SpO2 = 110 - 25 R, common
	// practice; docs/references.md), kept in the store as ward-fit@v1.
	if _, err := db.PutCalibration(store.Calibration{Name: "ward-fit", CurveYAML: "name: ward-fit\nversion: 1\nmodel: linear\ncoefficients: [110, -25]\nratio_min: 0.2\nratio_max: 2.4\n"}, nil); err != nil {
		t.Fatal(err)
	}
	dev := func(id, cal string) *store.Device {
		return &store.Device{ID: id, Mode: "raw", RedNM: 660, IRNM: 940, ADCBits: rawBits, Calibration: cal}
	}
	b := &store.Batch{Devices: []*store.Device{dev("ward-3", "empirical"), dev("ward-4", "ward-fit@v1"),
		dev("ward-5", "beer-lambert@660/940nm"), {ID: "home-7", Mode: "summary"}}}
	dip := func(t float64) ppgmodel.Vitals { return dipVitals(t, 120) }
	a := rawCaptures("ward-3", ppgmodel.New(ppgmodel.Config{SampleRateHz: rawRate, ADCBits: rawBits, Seed: 11}), 200, 60, dip)
	b.Raw = append(b.Raw, a...)
	for _, c := range a {
		c.Device = "ward-4"
		b.Raw = append(b.Raw, c)
	}
	bl := ppgmodel.New(ppgmodel.Config{SampleRateHz: rawRate, ADCBits: rawBits, Seed: 12, Relation: ppgmodel.RelationBeerLambert})
	b.Raw = append(b.Raw, rawCaptures("ward-5", bl, 120, -1, func(float64) ppgmodel.Vitals { return dipVitals(0, 1e9) })...)
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	return dir
}

const averagingGrid = `
base:
  name: dip-test
  conditions:
    - {kind: spo2_low, limit: 90, hysteresis: 1, delay: 0s, priority: medium}
sweep:
  spo2_low.limit: [88, 92]
averaging: [4s, 16s]
reference:
  rule: {below: 85, for: 2s}
  grace: 10s
`

func minSpO2(s []alarms.Sample, from, to float64) float64 {
	m := math.Inf(1)
	for _, x := range s {
		if x.T >= from && x.T < to && x.SpO2 == x.SpO2 {
			m = math.Min(m, x.SpO2)
		}
	}
	return m
}

func medianSpO2(s []alarms.Sample, from, to float64) float64 {
	var v []float64
	for _, x := range s {
		if x.T >= from && x.T < to && x.SpO2 == x.SpO2 {
			v = append(v, x.SpO2)
		}
	}
	return stats.Median(v)
}

// TestAveragingOverRawCaptures re-estimates stored raw captures at two
// averaging times and sweeps the alarm grid over each.
func TestAveragingOverRawCaptures(t *testing.T) {
	dir := rawStore(t)
	g, err := ParseGrid([]byte(averagingGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	est, err := EstimateStore(context.Background(), dir, Filter{}, g.AveragingS, EstimateOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(est.Skipped, []string{"home-7"}) || len(est.Trends) != 2 || len(est.Trends[0]) != 3 {
		t.Fatalf("skipped %v, %d sets of %d devices; want home-7 skipped, 2 sets of 3", est.Skipped, len(est.Trends), len(est.Trends[0]))
	}
	wantCal := map[string]string{"ward-3": "empirical", "ward-4": "ward-fit@v1", "ward-5": "beer-lambert@660/940nm"}
	for d, c := range wantCal {
		if est.Calibrations[d] != c {
			t.Errorf("%s calibration %q, want %q", d, est.Calibrations[d], c)
		}
	}
	// One start per device and averaging time, plus one at ward-3's and
	// ward-4's lost chunk; 399 + 399 + 240 chunks of 25 samples.
	if est.Restarts != 5 || est.Chunks != 1038 || est.SamplePairs != 1038*rawChunk {
		t.Errorf("restarts %d, chunks %d, pairs %d; want 5, 1038, %d", est.Restarts, est.Chunks, est.SamplePairs, 1038*rawChunk)
	}
	t0 := rawT0MS / 1000
	for a, set := range est.Trends {
		w3, w4, w5 := set[0], set[1], set[2]
		if w3.Device != "ward-3" || w4.Device != "ward-4" || w5.Device != "ward-5" {
			t.Fatalf("set %d devices %s %s %s, want ward-3 ward-4 ward-5 (store order)", a, w3.Device, w4.Device, w5.Device)
		}
		// One point per second at the end of each second on the device
		// clock; the lost chunk (30-30.5 s) restarts the count at 30.5 s, the
		// next chunk's time, so those seconds end on the half second.
		if n := len(w3.Samples); n != 199 || w3.Samples[0].T != t0+1 || w3.Samples[29].T != t0+30 || w3.Samples[30].T != t0+31.5 {
			t.Fatalf("averaging %v s: ward-3 has %d points, first at %+v, 30th %v, 31st %v; want 199 at t0+1..30, t0+31.5..",
				est.AveragingS[a], n, w3.Samples[0].T-t0, w3.Samples[29].T-t0, w3.Samples[30].T-t0)
		}
		// A stored curve equal to the empirical line gives the same trend.
		if len(w4.Samples) != len(w3.Samples) {
			t.Fatalf("ward-4 %d points, ward-3 %d", len(w4.Samples), len(w3.Samples))
		}
		for i := range w3.Samples {
			x, y := w3.Samples[i], w4.Samples[i]
			if x.T != y.T || !(math.Abs(x.SpO2-y.SpO2) < 1e-9 || (x.SpO2 != x.SpO2 && y.SpO2 != y.SpO2)) {
				t.Fatalf("second %d: ward-3 %+v, ward-4 (stored empirical curve) %+v", i, x, y)
			}
		}
		// Before the dip ppgmodel's 97 % comes back through the empirical
		// line; ward-5's Beer-Lambert source through the Beer-Lambert
		// inverse (docs/references.md: Prahl tabulation, via ppgmodel). 2 points
		// is the estimator's accuracy on clean model signals (estimator tests).
		if m := medianSpO2(w3.Samples, t0+60, t0+115); math.Abs(m-97) > 2 {
			t.Errorf("averaging %v s: ward-3 median SpO2 before the dip %.1f %%, want 97 +- 2", est.AveragingS[a], m)
		}
		if m := medianSpO2(w5.Samples, t0+30, t0+120); math.Abs(m-97) > 2 {
			t.Errorf("averaging %v s: ward-5 (beer-lambert) median SpO2 %.1f %%, want 97 +- 2", est.AveragingS[a], m)
		}
	}

	// The dip (120-128 s, 6 s below 90 %) is shorter than the 16 s window
	// but longer than the 4 s one: the 4 s estimate follows it below the
	// limits, the 16 s estimate averages it with the normal beats around it
	// and stays higher (estimator doc: lag and smoothing grow with the
	// window).
	short, long := est.Trends[0][0].Samples, est.Trends[1][0].Samples
	minShort, minLong := minSpO2(short, t0+115, t0+150), minSpO2(long, t0+115, t0+150)
	t.Logf("minimum SpO2 in the dip: %.1f %% at 4 s, %.1f %% at 16 s (truth 80 %%)", minShort, minLong)
	if !(minShort < 88) {
		t.Errorf("4 s averaging: minimum %.1f %% in the dip, want below 88 (the truth reaches 80 for 4 s)", minShort)
	}
	if !(minLong > minShort) {
		t.Errorf("16 s averaging: minimum %.1f %%, want above the 4 s minimum %.1f %%", minLong, minShort)
	}

	res, err := RunEstimated(context.Background(), g, est, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if len(res.Rows) != 4 || res.Devices != 3 || res.ReferenceAveraging != "4s" {
		t.Fatalf("%d rows over %d devices, reference from %q; want 4 rows, 3 devices, reference from 4s", len(res.Rows), res.Devices, res.ReferenceAveraging)
	}
	// The reference events come from the 4 s trends for every row.
	events := 0
	for _, tr := range est.Trends[0] {
		events += len(RuleEvents(tr.Device, tr.Samples, *g.Reference.Rule))
	}
	if res.Events != events {
		t.Errorf("%d reference events, the rule on the 4 s trends gives %d", res.Events, events)
	}
	byLimit := map[string][2]int{}
	for i, pt := range res.Points {
		// Each row counts episodes exactly as replay of its re-estimated trends.
		eps, err := alarms.ReplayTrends(pt.Profile, est.Trends[pt.set])
		if err != nil {
			t.Fatal(err)
		}
		if res.Rows[i].Episodes != len(eps) {
			t.Errorf("%s (%v): %d episodes, replay of the %s trends gives %d", pt.Name, pt.Values, res.Rows[i].Episodes, pt.Values[0], len(eps))
		}
		c := byLimit[pt.Values[1]]
		c[pt.set] = res.Rows[i].Episodes
		byLimit[pt.Values[1]] = c
	}
	for lim, c := range byLimit {
		t.Logf("limit %s: %d episodes at 4 s, %d at 16 s", lim, c[0], c[1])
		// A dip briefer than the window cannot raise more episodes when
		// smoothed; at 4 s it does raise one on ward-3 and ward-4 each.
		if c[1] > c[0] || c[0] < 2 {
			t.Errorf("limit %s: %d episodes at 16 s, %d at 4 s; want at least 2 at 4 s and no more at 16 s", lim, c[1], c[0])
		}
	}

	// The trends file round-trips exactly (replay reads what tune swept).
	var buf bytes.Buffer
	if err := WriteTrendCSV(&buf, est.Trends[1]); err != nil {
		t.Fatal(err)
	}
	back, err := alarms.ReadTrendCSV(&buf)
	if err != nil {
		t.Fatal(err)
	}
	for d := range back {
		if back[d].Device != est.Trends[1][d].Device || len(back[d].Samples) != len(est.Trends[1][d].Samples) {
			t.Fatalf("trend csv device %d: %s with %d samples, want %s with %d", d, back[d].Device, len(back[d].Samples),
				est.Trends[1][d].Device, len(est.Trends[1][d].Samples))
		}
		for i, s := range back[d].Samples {
			o := est.Trends[1][d].Samples[i]
			if s.T != o.T || !sameF(s.SpO2, o.SpO2) || !sameF(s.Pulse, o.Pulse) || !sameF(s.PI, o.PI) || !sameF(s.SQI, o.SQI) {
				t.Fatalf("trend csv %s sample %d: %+v, want %+v", back[d].Device, i, s, o)
			}
		}
	}
}

func TestEstimateStoreErrors(t *testing.T) {
	dir := rawStore(t)
	ctx := context.Background()
	for _, tc := range []struct {
		name string
		f    Filter
		want string
	}{
		{"listed device without captures", Filter{Devices: []string{"home-7"}}, `device "home-7" has no raw captures in store`},
		{"unknown device", Filter{Devices: []string{"ward-9"}}, `device "ward-9" is not in store`},
		{"nothing in range", Filter{From: 1e9, To: 1.1e9, HasFrom: true, HasTo: true}, "has no raw captures (from 1e+09 s, to 1.1e+09 s) (of 4 devices)"},
	} {
		if _, err := EstimateStore(ctx, dir, tc.f, []float64{8}, EstimateOptions{}); err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%s: %v, want %q", tc.name, err, tc.want)
		}
	}
	// A recorded calibration this store cannot resolve names the device.
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	err = db.Write(&store.Batch{Devices: []*store.Device{{ID: "ward-6", Mode: "raw", RedNM: 660, IRNM: 940, ADCBits: rawBits, Calibration: "gone-fit@v2"}},
		Raw: rawCaptures("ward-6", ppgmodel.New(ppgmodel.Config{SampleRateHz: rawRate, ADCBits: rawBits, Seed: 13}), 2, -1,
			func(float64) ppgmodel.Vitals { return ppgmodel.DefaultVitals() })})
	if cerr := db.Close(); err != nil || cerr != nil {
		t.Fatal(err, cerr)
	}
	_, err = EstimateStore(ctx, dir, Filter{}, []float64{8}, EstimateOptions{})
	if err == nil || !strings.Contains(err.Error(), `device ward-6: calibration "gone-fit@v2": not a curve kept in this store`) {
		t.Errorf("unresolvable calibration: %v, want it to name ward-6 and gone-fit@v2", err)
	}
}

// Device and time filters: only the named device's captures that start in
// [From, To) are read, and only points in [From, To) are kept; the
// estimator warms up from the first capture in range (estimator doc: first
// values after about 3 s).
func TestEstimateStoreFilter(t *testing.T) {
	dir := rawStore(t)
	t0 := rawT0MS / 1000
	f := Filter{Devices: []string{"ward-5"}, From: t0 + 60, To: t0 + 90, HasFrom: true, HasTo: true}
	est, err := EstimateStore(context.Background(), dir, f, []float64{8}, EstimateOptions{Workers: 1})
	if err != nil {
		t.Fatal(err)
	}
	if len(est.Trends[0]) != 1 || est.Trends[0][0].Device != "ward-5" || est.Chunks != 60 || len(est.Skipped) != 0 {
		t.Fatalf("%d trends, %d chunks, skipped %v; want ward-5 alone from 60 chunks (30 s)", len(est.Trends[0]), est.Chunks, est.Skipped)
	}
	s := est.Trends[0][0].Samples
	if len(s) != 29 || s[0].T != t0+61 || s[len(s)-1].T != t0+89 {
		t.Fatalf("%d points from %v to %v s, want 29 from 61 to 89 s (the point at 90 s ends after To)", len(s), s[0].T-t0, s[len(s)-1].T-t0)
	}
	if !math.IsNaN(s[0].SpO2) || math.IsNaN(s[len(s)-1].SpO2) {
		t.Errorf("first point SpO2 %v, last %v: want the warm-up withheld and a value once the window fills", s[0].SpO2, s[len(s)-1].SpO2)
	}
}
