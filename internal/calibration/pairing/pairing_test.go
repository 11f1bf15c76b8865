package pairing

import (
	"bytes"
	"fmt"
	"math"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// staircase is a generated breathe-down: plateaus of 97, 90, 85 and 70 %
// SpO2 held 120 s each, joined by 40 s ramps (a made-up protocol for the
// test, shaped like an induced-hypoxemia study).
func staircase(k int) float64 {
	levels := []float64{97, 90, 85, 70}
	const hold, ramp = 120, 40
	seg := k / (hold + ramp)
	if seg >= len(levels)-1 {
		return levels[len(levels)-1]
	}
	in := k % (hold + ramp)
	if in < hold {
		return levels[seg]
	}
	return levels[seg] + (levels[seg+1]-levels[seg])*float64(in-hold)/ramp
}

// recording renders the staircase through the physical PPG model with the
// Beer-Lambert relation at 660/940 nm as a raw CSV (t_s,red,ir) and a
// reference CSV (t_s,subject,spo2_ref_pct) holding the true saturation.
func recording(t *testing.T, seconds int) (raw, ref string) {
	t.Helper()
	const rate = 100
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Relation: ppgmodel.RelationBeerLambert, Seed: 7})
	red, ir := make([]float64, rate), make([]float64, rate)
	var rb, fb strings.Builder
	rb.WriteString("t_s,red,ir\n")
	fb.WriteString("t_s,subject,spo2_ref_pct\n")
	for k := 0; k < seconds; k++ {
		v := ppgmodel.DefaultVitals()
		v.SpO2Pct = staircase(k)
		src.Fill(red, ir, nil, v)
		for i := range red {
			fmt.Fprintf(&rb, "%.2f,%.0f,%.0f\n", float64(k)+float64(i)/rate, red[i], ir[i])
		}
		fmt.Fprintf(&fb, "%d,bench-7,%.2f\n", k, v.SpO2Pct)
		fmt.Fprintf(&fb, "%d,other,50\n", k) // another subject in the same file
	}
	return rb.String(), fb.String()
}

func TestFromRecordingPairsPlateausOnTheBeerLambertCurve(t *testing.T) {
	raw, ref := recording(t, 600)
	pairs, rep, err := FromRecording(strings.NewReader(raw), strings.NewReader(ref),
		Options{RateHz: 100, ADCBits: 16, Align: calibration.AlignOptions{Subject: "bench-7"}, ReferenceSubject: "bench-7"})
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%s", rep)
	// 600 s in 30 s windows: 20 windows; the three 40 s ramps (0.25 %/s or
	// more) make the windows they touch unstable (> 2 % spread).
	if rep.Windows != 20 || rep.ReferenceUnstable < 3 || rep.Kept < 12 {
		t.Errorf("report %+v, want 20 windows, >= 3 unstable (the ramps), >= 12 kept", rep)
	}
	// docs/references.md Beer-Lambert worked values at 660/940 nm (computed from
	// the Prahl table, seen): R(97 %) = 0.3395, R(90 %) = 0.5252,
	// R(85 %) = 0.6652, R(70 %) = 1.1265.
	want := map[float64]float64{97: 0.3395, 90: 0.5252, 85: 0.6652, 70: 1.1265}
	seen := map[float64]int{}
	for _, p := range pairs {
		r, ok := want[p.ReferencePct]
		if !ok {
			t.Errorf("pair %+v: reference not on a plateau; a stable window should be", p)
			continue
		}
		seen[p.ReferencePct]++
		if math.Abs(p.Ratio-r) > 0.03*r {
			t.Errorf("pair at %.0f %%: R %.4f, want %.4f +- 3 %% (Beer-Lambert)", p.ReferencePct, p.Ratio, r)
		}
		if p.Subject != "bench-7" {
			t.Errorf("pair subject %q, want bench-7", p.Subject)
		}
	}
	if len(seen) != 4 {
		t.Errorf("pairs on plateaus %v, want all four", seen)
	}
}

func TestReadRawAndReferenceErrors(t *testing.T) {
	for _, tc := range []struct{ name, in, want string }{
		{"missing column", "t_s,red\n0,1\n", `want columns "red" and "ir"`},
		{"bad number", "red,ir\n1,2\n1,x\n", `line 3: ir: "x" is not a finite number`},
		{"empty", "", "empty input"},
	} {
		if _, err := ReadRaw(strings.NewReader(tc.in), "", ""); err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("raw %s: error %v, want %q", tc.name, err, tc.want)
		}
	}
	for _, tc := range []struct{ name, in, subject, want string }{
		{"missing column", "t_s,spo2\n0,97\n", "", "want columns t_s and spo2_ref_pct"},
		{"out of range", "t_s,spo2_ref_pct\n0,101\n", "", "spo2_ref_pct: 101, want 0..100"},
		{"negative time", "t_s,spo2_ref_pct\n-1,97\n", "", "t_s: -1, want 0..1e9 s"},
		{"several subjects, none named", "t_s,device,spo2_ref_pct\n0,a,97\n0,b,96\n", "", "device: 2 different values"},
		{"unknown subject", "t_s,subject,spo2_ref_pct\n0,a,97\n", "b", `no rows (for subject "b")`},
	} {
		if _, err := ReadReference(strings.NewReader(tc.in), tc.subject); err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("reference %s: error %v, want %q", tc.name, err, tc.want)
		}
	}
	got, err := ReadReference(strings.NewReader("t_s,spo2_ref_pct,pulse\n0.0,97.5,60\n1.0,,61\n2.9,96,60\n"), "")
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 3 || got[0] != (calibration.ReferenceSecond{Second: 0, SpO2Pct: 97.5}) || !math.IsNaN(got[1].SpO2Pct) || got[2].Second != 2 {
		t.Errorf("reference %+v: want seconds 0, 1 (missing), 2", got)
	}
}

func TestPairsFileRoundTrip(t *testing.T) {
	raw, ref := recording(t, 200)
	pairs, _, err := FromRecording(strings.NewReader(raw), strings.NewReader(ref), Options{RateHz: 100, Align: calibration.AlignOptions{Subject: "b7"}, ReferenceSubject: "bench-7"})
	if err != nil {
		t.Fatal(err)
	}
	var b bytes.Buffer
	if err := calibration.WritePairs(&b, pairs); err != nil {
		t.Fatal(err)
	}
	back, err := calibration.ReadPairs(&b)
	if err != nil || len(back) != len(pairs) {
		t.Fatalf("pairs file: %v, %d pairs back of %d", err, len(back), len(pairs))
	}
}
