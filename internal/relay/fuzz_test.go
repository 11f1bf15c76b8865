package relay

import (
	"math"
	"testing"
	"time"
)

// Any line, in either format, is a sample, a header, a skipped empty line
// or a rejection with a reason; never a panic. An accepted raw sample's
// codes are within the converter's range, a summary's values within their
// bounds, and the assembler turns accepted samples into messages whose
// device times never go backwards within a run.
func FuzzParseAndAssemble(f *testing.F) {
	for _, s := range []string{"red,ir", "t_ms,red,ir,ambient", "1000,2000", "1;2", "3\t4", " 5  6 ", "1e3,2e3", "-1,5",
		"spo2,pulse,pi,sqi", "97,,1.5,0.9", "NaN,1", "Inf,1", "1,2,3", ",", "\ufefft_s,red,ir"} {
		f.Add(s, s+"\n"+s, false)
		f.Add(s, "100,200\n0.01,300,400", true)
	}
	f.Fuzz(func(t *testing.T, first, rest string, summary bool) {
		format := Raw
		if summary {
			format = Summary
		}
		p, err := NewParser(format, nil, 12)
		if err != nil {
			t.Fatal(err)
		}
		a := NewAssembler(AssemblerConfig{Format: format, RateHz: 100, AnchorMS: 1_700_000_000_000}, nil)
		at := time.UnixMilli(1_700_000_000_000)

		check := func(cs []Chunk) {
			for _, c := range cs {
				if r := c.Msg.GetRawChunk(); r != nil {
					if len(r.Red) == 0 || len(r.Red) != len(r.Ir) || len(r.Red) > 1000 || r.SampleRateHz < 25 || r.SampleRateHz > 1000 {
						t.Fatalf("bad chunk: %d red, %d ir, %v Hz", len(r.Red), len(r.Ir), r.SampleRateHz)
					}

				}
			}
		}
		for i, line := range append([]string{first}, splitLines(rest)...) {
			s, ok, reason, header, err := p.Parse([]byte(line))
			if err != nil {
				return // a header naming known columns but not the needed ones ends the input
			}
			if ok && (reason != "" || header) {
				t.Fatalf("%q: ok with reason %q header %v", line, reason, header)
			}
			if !ok {
				continue
			}
			if format == Raw && (s.Red > 4095 || s.IR > 4095 || s.Ambient > 4095) {
				t.Fatalf("%q: codes %d %d %d beyond 12 bits", line, s.Red, s.IR, s.Ambient)
			}
			if format == Summary {
				for _, v := range []float64{s.SpO2, s.PI} {
					if !math.IsNaN(v) && (v < 0 || v > 100) {
						t.Fatalf("%q: value %v out of 0..100", line, v)
					}
				}
			}
			check(a.Add(s, int64(i), at.Add(time.Duration(i)*10*time.Millisecond)))
		}
		check(a.Flush(true))
	})
}

func splitLines(s string) []string {
	var out []string
	for len(s) > 0 {
		i := 0
		for i < len(s) && s[i] != '\n' {
			i++
		}
		out = append(out, s[:i])
		if i < len(s) {
			i++
		}
		s = s[i:]
	}
	return out
}
