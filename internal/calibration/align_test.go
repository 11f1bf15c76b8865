package calibration

import (
	"math"
	"strings"
	"testing"
)

// A made-up 100 s session (invented data, for the rules only): the
// reference holds 97 % for 40 s, falls 97 -> 87 % over 20 s, holds 87 % for
// 40 s. The device reports R = (110 - SpO2)/25 (docs/references.md empirical line,
// common practice) one second late.
func session() ([]DeviceSecond, []ReferenceSecond) {
	spo2 := func(k int64) float64 {
		switch {
		case k < 40:
			return 97
		case k < 60:
			return 97 - 10*float64(k-40)/20
		}
		return 87
	}
	var dev []DeviceSecond
	var ref []ReferenceSecond
	for k := int64(0); k < 100; k++ {
		ref = append(ref, ReferenceSecond{Second: k, SpO2Pct: spo2(k)})
		dev = append(dev, DeviceSecond{Second: k, Ratio: (110 - spo2(k-1)) / 25, SQI: 0.9})
	}
	return dev, ref
}

func TestAlignKeepsOnlyStableStretches(t *testing.T) {
	dev, ref := session()
	pairs, rep, err := Align(dev, ref, AlignOptions{WindowS: 20, Subject: "s1"})
	if err != nil {
		t.Fatal(err)
	}
	// Windows 0-19, 20-39, 60-79, 80-99 are stable; 40-59 spans 10 % of fall.
	if rep.Windows != 5 || rep.Kept != 4 || rep.ReferenceUnstable != 1 || rep.Dropped() != 1 {
		t.Fatalf("report %+v, want 5 windows, 4 kept, 1 unstable", rep)
	}
	want := []float64{97, 97, 87, 87}
	for i, p := range pairs {
		if p.ReferencePct != want[i] || math.Abs(p.Ratio-(110-want[i])/25) > 1e-12 || p.Subject != "s1" {
			t.Errorf("pair %d: %+v, want reference %v, ratio %v, subject s1", i, p, want[i], (110-want[i])/25)
		}
	}
	if s := rep.String(); !strings.Contains(s, "4 pairs kept, 1 dropped (1 reference not stable)") {
		t.Errorf("report reads %q", s)
	}
}

func TestAlignDropsPoorQualityAndMissingReference(t *testing.T) {
	dev, ref := session()
	for i := 0; i < 20; i++ { // first window: SQI poor in 15 of 20 s
		if i < 15 {
			dev[i].SQI = 0.2
		}
	}
	for i := 20; i < 40; i++ { // second window: the ratio withheld in 11 s
		if i%2 == 0 || i == 21 {
			dev[i].Ratio = math.NaN()
		}
	}
	ref = append(ref[:60:60], ref[84:]...) // reference logger stopped 60..83
	_, rep, err := Align(dev, ref, AlignOptions{WindowS: 20})
	if err != nil {
		t.Fatal(err)
	}
	if rep.LowQuality != 2 || rep.NoReference != 1 || rep.ReferenceUnstable != 1 || rep.Kept != 1 {
		t.Errorf("report %+v, want 2 low quality, 1 no reference (60-79), 1 unstable, 1 kept (80-99 with 16 s of reference, 0.8 of the window)", rep)
	}
}

func TestAlignReferenceLag(t *testing.T) {
	// Device second k shows the saturation of second k-1. With a lag of -1
	// the reference is read one second earlier too, and the windows across
	// the fall still pair exactly: every pair lies on the line.
	dev, ref := session()
	pairs, _, err := Align(dev, ref, AlignOptions{WindowS: 5, ReferenceLagS: -1, MaxReferenceSpreadPct: 100})
	if err != nil {
		t.Fatal(err)
	}
	if len(pairs) != 20 { // the first window lacks reference second -1 but keeps 4 of 5 (0.8)
		t.Fatalf("%d pairs, want 20", len(pairs))
	}
	for _, p := range pairs {
		if math.Abs(p.Ratio-(110-p.ReferencePct)/25) > 1e-9 {
			t.Errorf("pair %+v off the line with the lag applied", p)
		}
	}
}

func TestAlignOptionsBounds(t *testing.T) {
	for _, o := range []AlignOptions{{WindowS: -1}, {MinSQI: 2}, {MaxReferenceSpreadPct: -1}, {MinValidFraction: 1.5}} {
		if _, _, err := Align(nil, nil, o); err == nil {
			t.Errorf("options %+v accepted", o)
		}
	}
}
