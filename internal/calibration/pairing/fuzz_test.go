package pairing

import (
	"math"
	"strings"
	"testing"
)

func FuzzReadReference(f *testing.F) {
	f.Add("t_s,spo2_ref_pct,pulse_ref_bpm\n0,97.7,57\n1,,58\n", "")
	f.Add("t_s,device,reference_pct\n0.5,a,90\n0.5,b,91\n", "b")
	f.Add("t_s,subject,spo2_ref_pct\n1e9,x,100\n", "x")
	f.Fuzz(func(t *testing.T, in, subject string) {
		refs, err := ReadReference(strings.NewReader(in), subject)
		if err != nil {
			return
		}
		for _, r := range refs {
			if r.Second < 0 || !(math.IsNaN(r.SpO2Pct) || r.SpO2Pct >= 0 && r.SpO2Pct <= 100) {
				t.Fatalf("accepted %+v: want second >= 0 and SpO2 0..100 or missing", r)
			}
		}
	})
}

func FuzzReadRaw(f *testing.F) {
	f.Add("t_s,red,ir\n0,1000,2000\n0.01,1001,2002\n", "", "")
	f.Add("t_s,r,g,b\n0.0000,40.05,89.1,49.4\n", "r", "g")
	f.Fuzz(func(t *testing.T, in, red, ir string) {
		raw, err := ReadRaw(strings.NewReader(in), red, ir)
		if err != nil {
			return
		}
		if len(raw.Red) == 0 || len(raw.Red) != len(raw.IR) {
			t.Fatalf("accepted %d red and %d ir samples", len(raw.Red), len(raw.IR))
		}
		for i := range raw.Red {
			if math.IsNaN(raw.Red[i]) || math.IsInf(raw.Red[i], 0) || math.IsNaN(raw.IR[i]) || math.IsInf(raw.IR[i], 0) {
				t.Fatalf("accepted a non-finite sample at %d", i)
			}
		}
	})
}
