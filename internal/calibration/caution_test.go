package calibration

import (
	"bytes"
	"encoding/json"
	"io"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/caution"
)

// Every calibration output a person may keep or forward carries the caution
// in the form its format allows (docs/contracts.md, "The caution on every
// output"), and pulsefleet's own readers take the files back unchanged.
func TestCalibrationOutputsCarryTheCaution(t *testing.T) {
	var pairs []Pair
	for i, sub := range []string{"a", "b", "c"} {
		for k := 0; k < 30; k++ {
			spo2 := 70 + float64(k) + 0.3*float64(i)
			// The empirical line SpO2 = 110 - 25 R (docs/references.md, common practice).
			pairs = append(pairs, Pair{Ratio: (110 - spo2) / 25, ReferencePct: spo2, Subject: sub})
		}
	}
	res, err := Calibrate(pairs, FitOptions{Model: Linear, Name: "caution-check"})
	if err != nil {
		t.Fatal(err)
	}
	out := func(f func(io.Writer) error) string {
		t.Helper()
		var b bytes.Buffer
		if err := f(&b); err != nil {
			t.Fatal(err)
		}
		return b.String()
	}

	if txt := out(res.WriteText); !strings.Contains(txt, caution.Line) {
		t.Errorf("calibrate text output lacks the caution:\n%s", txt)
	}
	var js map[string]any
	if err := json.Unmarshal([]byte(out(res.WriteJSON)), &js); err != nil {
		t.Fatal(err)
	}
	if js[caution.JSONKey] != caution.Text {
		t.Errorf("calibrate JSON %q = %v, want the caution", caution.JSONKey, js[caution.JSONKey])
	}
	file, err := res.Curve.Marshal()
	if err != nil {
		t.Fatal(err)
	}
	if !strings.HasPrefix(string(file), caution.Comment) {
		t.Errorf("curve file does not start with the caution comment:\n%s", file)
	}
	if c, err := Parse(file); err != nil || c.Name != "caution-check" {
		t.Errorf("curve file with the caution does not parse back: %v, %v", c, err)
	}
	csvOut := out(func(w io.Writer) error { return WritePairs(w, pairs) })
	if !strings.HasPrefix(csvOut, caution.Comment) {
		t.Errorf("pairs CSV does not start with the caution comment:\n%.300s", csvOut)
	}
	if back, err := ReadPairs(strings.NewReader(csvOut)); err != nil || len(back) != len(pairs) {
		t.Errorf("pairs CSV with the caution reads back as %d pairs, %v; want %d", len(back), err, len(pairs))
	}
	if h := out(res.WriteHTML); !strings.Contains(h, caution.HTML()) {
		t.Errorf("calibration report lacks the caution")
	}
	for name, f := range map[string]func(io.Writer) error{
		"curve.svg":             res.WriteCurveSVG,
		"bland_altman.svg":      func(w io.Writer) error { return res.WriteBlandAltmanSVG(w, false) },
		"bland_altman_loso.svg": func(w io.Writer) error { return res.WriteBlandAltmanSVG(w, true) },
	} {
		if s := out(f); !strings.Contains(s, `class="caution"`) || !strings.Contains(s, "NOT a certified medical alarm") {
			t.Errorf("%s lacks the caution note", name)
		}
	}
}
