package calibration

import (
	"bytes"
	"encoding/json"
	"encoding/xml"
	"errors"
	"io"
	"math"
	"strings"
	"testing"
)

// threeSubjects: subjects a and b lie on SpO2 = 110 - 25 R (docs/references.md
// empirical line, common practice); subject c reads 3 % higher at every R.
func threeSubjects() []Pair {
	line := []float64{110, -25}
	var pairs []Pair
	pairs = append(pairs, pairsFrom(line, 0.4, 1.6, 40, "a")...)
	pairs = append(pairs, pairsFrom(line, 0.45, 1.55, 40, "b")...)
	for _, p := range pairsFrom(line, 0.55, 1.5, 40, "c") {
		p.ReferencePct += 3
		pairs = append(pairs, p)
	}
	return pairs
}

func TestLeaveOneSubjectOutScoresHeldOutSubjects(t *testing.T) {
	l, err := LeaveOneSubjectOut(threeSubjects(), Linear)
	if err != nil {
		t.Fatal(err)
	}
	if len(l.Subjects) != 3 {
		t.Fatalf("%d subject scores, want 3", len(l.Subjects))
	}
	byName := map[string]SubjectScore{}
	for _, s := range l.Subjects {
		byName[s.Subject] = s
	}
	// Held out, c is predicted by the line fitted to a and b alone, exactly
	// 3 % below its reference: bias -3, SD 0, Arms 3. An in-sample fit would
	// have absorbed part of the offset.
	c := byName["c"].Fit
	if math.Abs(c.BiasPct+3) > 1e-9 || c.SDPct > 1e-9 || math.Abs(c.ArmsPct-3) > 1e-9 {
		t.Errorf("held-out c: bias %v SD %v Arms %v, want -3, 0, 3", c.BiasPct, c.SDPct, c.ArmsPct)
	}
	// Held-out a and b are predicted by a line pulled up by c: their
	// predictions read high, never exact.
	for _, n := range []string{"a", "b"} {
		if s := byName[n].Fit; !(s.BiasPct > 0.1) {
			t.Errorf("held-out %s: bias %v, want clearly positive (the others include c, 3 %% high)", n, s.BiasPct)
		}
	}
	// The fitted curve beats predicting the training mean by far.
	if !(l.Pooled.ArmsPct < l.Baseline.ArmsPct/3) {
		t.Errorf("pooled Arms %v, mean-predictor Arms %v: want the fit at least 3x better", l.Pooled.ArmsPct, l.Baseline.ArmsPct)
	}
	if l.Pooled.N != 120 || l.Pooled.Subjects != 3 {
		t.Errorf("pooled n %d subjects %d, want 120 and 3", l.Pooled.N, l.Pooled.Subjects)
	}
}

func TestLeaveOneSubjectOutNeedsSubjects(t *testing.T) {
	one := pairsFrom([]float64{110, -25}, 0.4, 1, 10, "only")
	if _, err := LeaveOneSubjectOut(one, Linear); err == nil || !strings.Contains(err.Error(), "needs >= 2") {
		t.Errorf("one subject: error %v, want one naming the bound", err)
	}
	mixed := append(one, Pair{Ratio: 0.5, ReferencePct: 97})
	if _, err := Calibrate(mixed, FitOptions{Model: Linear, Name: "x"}); err == nil || !strings.Contains(err.Error(), "subject") {
		t.Errorf("some pairs without subject: error %v, want one naming subject", err)
	}
}

func TestCalibrateWritesLoadableCurveAndReports(t *testing.T) {
	res, err := Calibrate(threeSubjects(), FitOptions{Model: Quadratic, Name: "proto-b", DeviceModel: "proto-b", FittedAt: "2026-11-30T10:00:00Z"})
	if err != nil {
		t.Fatal(err)
	}
	y, err := res.Curve.Marshal()
	if err != nil {
		t.Fatal(err)
	}
	back, err := Parse(y)
	if err != nil {
		t.Fatalf("curve file does not parse back: %v\n%s", err, y)
	}
	for _, r := range []float64{0.4, 0.77, 1.6} {
		a, _ := res.Curve.SpO2(r)
		b, _ := back.SpO2(r)
		if math.Abs(a-b) > 1e-9 {
			t.Errorf("SpO2(%v): %v before the file, %v after", r, a, b)
		}
	}
	if back.Stats["loso_arms_pct"] == nil || back.Stats["pairs"] == nil {
		t.Errorf("curve stats %v lack pairs/loso_arms_pct", back.Stats)
	}

	var text bytes.Buffer
	if err := res.WriteText(&text); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"proto-b@v1", "Arms %", "leave-one-subject-out", "mean predictor", "90-100 %", "warnings:", "outside the other subjects' range"} {
		if !strings.Contains(text.String(), want) {
			t.Errorf("text report lacks %q:\n%s", want, text.String())
		}
	}

	var js bytes.Buffer
	if err := res.WriteJSON(&js); err != nil {
		t.Fatal(err)
	}
	var parsed struct {
		Fit struct {
			ArmsPct float64 `json:"arms_pct"`
		} `json:"fit"`
		LOSO struct {
			Pooled struct{ N int } `json:"pooled"`
		} `json:"loso"`
		Warnings []string `json:"warnings"`
	}
	if err := json.Unmarshal(js.Bytes(), &parsed); err != nil {
		t.Fatalf("JSON report: %v\n%s", err, js.String())
	}
	if parsed.LOSO.Pooled.N != 120 || math.Abs(parsed.Fit.ArmsPct-res.Fit.ArmsPct) > 1e-6 {
		t.Errorf("JSON report: loso n %d arms %v, want 120 and %v", parsed.LOSO.Pooled.N, parsed.Fit.ArmsPct, res.Fit.ArmsPct)
	}

	for name, write := range map[string]func(io.Writer) error{
		"curve":             res.WriteCurveSVG,
		"bland-altman":      func(w io.Writer) error { return res.WriteBlandAltmanSVG(w, false) },
		"bland-altman-loso": func(w io.Writer) error { return res.WriteBlandAltmanSVG(w, true) },
		"html":              res.WriteHTML,
	} {
		var b bytes.Buffer
		if err := write(&b); err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		s := b.String()
		if name != "html" {
			assertWellFormedXML(t, name, s)
			for _, want := range []string{"<svg", "(%)", "<circle"} {
				if !strings.Contains(s, want) {
					t.Errorf("%s SVG lacks %q", name, want)
				}
			}
			continue
		}
		// Self-contained: no scripts, stylesheets or images fetched from elsewhere.
		for _, bad := range []string{"<script", "<link", "src=", "@import"} {
			if strings.Contains(s, bad) {
				t.Errorf("html report contains %q, want a self-contained page", bad)
			}
		}
		for _, want := range []string{"<svg", "Bland-Altman", "mean predictor", "name: proto-b"} {
			if !strings.Contains(s, want) {
				t.Errorf("html report lacks %q", want)
			}
		}
	}
}

func assertWellFormedXML(t *testing.T, name, s string) {
	t.Helper()
	dec := xml.NewDecoder(strings.NewReader(s))
	for {
		_, err := dec.Token()
		if errors.Is(err, io.EOF) {
			return
		}
		if err != nil {
			t.Fatalf("%s SVG is not well-formed XML: %v", name, err)
		}
	}
}
