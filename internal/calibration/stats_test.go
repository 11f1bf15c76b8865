package calibration

import (
	"math"
	"strings"
	"testing"

	"pgregory.net/rapid"
)

func TestScoreWorkedExample(t *testing.T) {
	// Differences d = 2, 0, 4, 2 (worked by hand):
	// bias = 2; population SD = sqrt((0+4+4+0)/4) = sqrt 2; Arms = sqrt((4+0+16+4)/4) = sqrt 6.
	// The sample SD sqrt(8/3) would break Arms^2 = bias^2 + SD^2, which
	// ISO 80601-2-61 relies on (docs/references.md, "Accuracy standards": Arms
	// seen in secondary sources; the identity is algebra): population form.
	ref := []float64{95, 90, 85, 80}
	pred := []float64{97, 90, 89, 82}
	s, err := Score(pred, ref, nil)
	if err != nil {
		t.Fatal(err)
	}
	check := func(name string, got, want float64) {
		t.Helper()
		if math.Abs(got-want) > 1e-12 {
			t.Errorf("%s = %.15g, want %.15g", name, got, want)
		}
	}
	check("bias", s.BiasPct, 2)
	check("SD", s.SDPct, math.Sqrt2)
	check("Arms", s.ArmsPct, math.Sqrt(6))
	check("MAE", s.MAEPct, 2)
	// Bland & Altman, Lancet 1986 (memory): limits of agreement bias -/+ 1.96 SD.
	check("LoA low", s.LoALow, 2-1.96*math.Sqrt2)
	check("LoA high", s.LoAHigh, 2+1.96*math.Sqrt2)
}

func TestScoreIdentitiesHoldForAnyData(t *testing.T) {
	rapid.Check(t, func(t *rapid.T) {
		n := rapid.IntRange(1, 300).Draw(t, "n")
		ref := rapid.SliceOfN(rapid.Float64Range(60, 100), n, n).Draw(t, "ref")
		pred := rapid.SliceOfN(rapid.Float64Range(50, 100), n, n).Draw(t, "pred")
		s, err := Score(pred, ref, nil)
		if err != nil {
			t.Fatal(err)
		}
		// ISO 80601-2-61 Arms (docs/references.md, seen in secondary sources): Arms^2 = bias^2 + SD^2 (algebra),
		// SD in the population form. Arms is computed from d^2 directly.
		if got, want := s.ArmsPct*s.ArmsPct, s.BiasPct*s.BiasPct+s.SDPct*s.SDPct; math.Abs(got-want) > 1e-9*math.Max(1, want) {
			t.Fatalf("Arms^2 = %.15g, bias^2 + SD^2 = %.15g", got, want)
		}
		// Bland & Altman, Lancet 1986 (memory): LoA = bias -/+ 1.96 SD.
		if math.Abs(s.LoAHigh-(s.BiasPct+1.96*s.SDPct)) > 1e-12 || math.Abs(s.LoALow-(s.BiasPct-1.96*s.SDPct)) > 1e-12 {
			t.Fatalf("LoA [%v, %v], want bias %v -/+ 1.96 x SD %v", s.LoALow, s.LoAHigh, s.BiasPct, s.SDPct)
		}
		if s.MAEPct > s.ArmsPct+1e-12 {
			t.Fatalf("MAE %v > Arms %v: mean |d| can never exceed sqrt(mean d^2)", s.MAEPct, s.ArmsPct)
		}
		total := 0
		for _, d := range s.Decades {
			total += d.N
			if d.N > 0 {
				if got, want := d.ArmsPct*d.ArmsPct, d.BiasPct*d.BiasPct+d.SDPct*d.SDPct; math.Abs(got-want) > 1e-9*math.Max(1, want) {
					t.Fatalf("decade %v: Arms^2 %v != bias^2 + SD^2 %v", d.LowPct, got, want)
				}
			}
		}
		if total != s.N70to100 {
			t.Fatalf("decades hold %d pairs, 70-100 %% holds %d", total, s.N70to100)
		}
	})
}

func TestScoreDecadesByReference(t *testing.T) {
	// Bands are [70,80), [80,90), [90,100]: 80 belongs to 80-90, 100 to 90-100,
	// 69.9 to none (it still counts in the overall stats).
	ref := []float64{69.9, 70, 79.99, 80, 89.9, 90, 100}
	pred := []float64{70.9, 71, 80.99, 82, 91.9, 93, 103}
	s, err := Score(pred, ref, nil)
	if err != nil {
		t.Fatal(err)
	}
	want := []struct {
		n    int
		bias float64
	}{{2, 1}, {2, 2}, {2, 3}}
	for i, w := range want {
		d := s.Decades[i]
		if d.N != w.n || math.Abs(d.BiasPct-w.bias) > 1e-9 {
			t.Errorf("decade %.0f-%.0f: n %d bias %v, want n %d bias %v", d.LowPct, d.HighPct, d.N, d.BiasPct, w.n, w.bias)
		}
	}
	if s.N != 7 || s.N70to100 != 6 {
		t.Errorf("n %d, n_70_100 %d; want 7 and 6", s.N, s.N70to100)
	}
}

func TestWarningsForSparseDecadesAndShortRange(t *testing.T) {
	var ref, pred []float64
	for i := 0; i < 30; i++ { // 30 pairs all in 90-100 %
		ref = append(ref, 90+float64(i)/4)
		pred = append(pred, 91+float64(i)/4)
	}
	s, err := Score(pred, ref, nil)
	if err != nil {
		t.Fatal(err)
	}
	w := strings.Join(s.Warnings(), "\n")
	for _, want := range []string{"decade 70-80 %: 0 pairs, want >= 10", "decade 80-90 %: 0 pairs", "does not cover 70-100 %"} {
		if !strings.Contains(w, want) {
			t.Errorf("warnings %q lack %q", w, want)
		}
	}
	if strings.Contains(w, "decade 90-100") {
		t.Errorf("warnings %q flag 90-100 %%, which has 30 pairs", w)
	}
}

func TestScoreRejectsBadInput(t *testing.T) {
	for name, args := range map[string][2][]float64{
		"length mismatch": {{90, 91}, {90}},
		"NaN prediction":  {{math.NaN()}, {90}},
		"empty":           {{}, {}},
	} {
		if _, err := Score(args[0], args[1], nil); err == nil {
			t.Errorf("%s: no error", name)
		}
	}
}
