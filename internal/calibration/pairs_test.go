package calibration

import (
	"bytes"
	"strings"
	"testing"
)

func TestReadPairs(t *testing.T) {
	in := "# exported from a bench session\nsubject,ratio,extra,reference_pct\nS1,0.52,x,97.1\nS2, 1.1 ,y,82\n"
	pairs, err := ReadPairs(strings.NewReader(in))
	if err != nil {
		t.Fatal(err)
	}
	want := []Pair{{Ratio: 0.52, ReferencePct: 97.1, Subject: "S1"}, {Ratio: 1.1, ReferencePct: 82, Subject: "S2"}}
	if len(pairs) != len(want) {
		t.Fatalf("got %v, want %v", pairs, want)
	}
	for i := range want {
		if pairs[i] != want[i] {
			t.Errorf("pair %d: %v, want %v", i, pairs[i], want[i])
		}
	}
}

func TestReadPairsErrorsNameLineFieldAndBound(t *testing.T) {
	for _, tc := range []struct{ name, in, want string }{
		{"no header", "", "want a header row"},
		{"missing column", "ratio,spo2\n0.5,97\n", "want columns ratio and reference_pct"},
		{"not a number", "ratio,reference_pct\n0.5,97\nabc,96\n", "line 3: ratio: \"abc\" is not a number"},
		{"empty cell", "ratio,reference_pct\n0.5,\n", "line 2: reference_pct: empty cell"},
		{"ratio out of range", "ratio,reference_pct\n-0.5,97\n", "ratio: -0.5, want a finite number in (0, 10]"},
		{"reference out of range", "ratio,reference_pct\n0.5,101\n", "reference_pct: 101, want 0..100"},
		{"no rows", "ratio,reference_pct\n", "no rows"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := ReadPairs(strings.NewReader(tc.in))
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("error %v, want one containing %q", err, tc.want)
			}
		})
	}
}

func FuzzReadPairs(f *testing.F) {
	f.Add("ratio,reference_pct,subject\n0.5,97,a\n1.0,85,b\n")
	f.Add("ratio,reference_pct\n0.5,97\n")
	f.Add("reference_pct,ratio\n\"97\",0.5\n")
	f.Fuzz(func(t *testing.T, in string) {
		pairs, err := ReadPairs(strings.NewReader(in))
		if err != nil {
			return
		}
		for _, p := range pairs {
			if err := p.validate(); err != nil {
				t.Fatalf("accepted an invalid pair %v: %v", p, err)
			}
		}
		// What was accepted survives a write/read round trip unchanged.
		var b bytes.Buffer
		if err := WritePairs(&b, pairs); err != nil {
			t.Fatal(err)
		}
		back, err := ReadPairs(&b)
		if err != nil {
			t.Fatalf("re-reading written pairs: %v\n%s", err, b.String())
		}
		if len(back) != len(pairs) {
			t.Fatalf("%d pairs after round trip, want %d", len(back), len(pairs))
		}
		for i := range back {
			if back[i].Ratio != pairs[i].Ratio || back[i].ReferencePct != pairs[i].ReferencePct || back[i].Subject != strings.TrimSpace(pairs[i].Subject) {
				t.Fatalf("pair %d: %v after round trip, want %v", i, back[i], pairs[i])
			}
		}
	})
}
