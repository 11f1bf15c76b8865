package sink

import (
	"strings"
	"testing"

	pulsefleetv1 "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func f64(v float64) *float64 { return &v }

// The sink checks the bounds ingest.proto states for each field and names
// the field; a valid message passes.
func TestCheckRawNamesFieldAndBound(t *testing.T) {
	ok := func() *pulsefleetv1.RawChunk {
		return &pulsefleetv1.RawChunk{Sequence: 1, SampleRateHz: 100, Red: []uint32{1, 2, 3}, Ir: []uint32{4, 5, 6}}
	}
	const top = 1<<18 - 1
	if f, d := checkRaw(ok(), top); f != "" {
		t.Fatalf("valid chunk rejected: %s %s", f, d)
	}
	for _, tc := range []struct {
		name  string
		edit  func(c *pulsefleetv1.RawChunk)
		field string
		bound string
	}{
		{"rate 0", func(c *pulsefleetv1.RawChunk) { c.SampleRateHz = 0 }, "raw_chunk.sample_rate_hz", "want 25..1000"},
		{"rate 1 MHz", func(c *pulsefleetv1.RawChunk) { c.SampleRateHz = 1e6 }, "raw_chunk.sample_rate_hz", "want 25..1000"},
		{"no samples", func(c *pulsefleetv1.RawChunk) { c.Red, c.Ir = nil, nil }, "raw_chunk.red", "want 1..1000"},
		{"lengths differ", func(c *pulsefleetv1.RawChunk) { c.Ir = c.Ir[:2] }, "raw_chunk.ir", "want 3 (as red)"},
		{"ambient length", func(c *pulsefleetv1.RawChunk) { c.Ambient = []uint32{1} }, "raw_chunk.ambient", "want 0 or 3"},
		{"code above range", func(c *pulsefleetv1.RawChunk) { c.Red[1] = top + 1 }, "raw_chunk.red", "want 0..262143"},
		{"ir code above range", func(c *pulsefleetv1.RawChunk) { c.Ir[2] = 1 << 30 }, "raw_chunk.ir", "sample 2"},
		{"led drive", func(c *pulsefleetv1.RawChunk) { c.LedDriveMa = 300 }, "raw_chunk.led_drive_ma", "want 0..255"},
		{"gain", func(c *pulsefleetv1.RawChunk) { c.Gain = -1 }, "raw_chunk.gain", "want 0..1000"},
	} {
		c := ok()
		tc.edit(c)
		f, d := checkRaw(c, top)
		if f != tc.field || !strings.Contains(d, tc.bound) {
			t.Errorf("%s: got %q %q, want %q with %q", tc.name, f, d, tc.field, tc.bound)
		}
	}
}

func TestCheckSummary(t *testing.T) {
	if f, _ := checkSummary(&pulsefleetv1.Summary{Sequence: 1, Spo2Pct: f64(97), PulseBpm: f64(70), PiPct: f64(2), Quality: f64(0.9)}); f != "" {
		t.Fatalf("valid summary rejected at %s", f)
	}
	if f, _ := checkSummary(&pulsefleetv1.Summary{Sequence: 1}); f != "" {
		t.Fatalf("summary with absent values rejected at %s", f)
	}
	for field, s := range map[string]*pulsefleetv1.Summary{
		"summary.spo2_pct":  {Spo2Pct: f64(101)},
		"summary.pulse_bpm": {PulseBpm: f64(351)},
		"summary.pi_pct":    {PiPct: f64(-0.1)},
		"summary.quality":   {Quality: f64(1.5)},
	} {
		if f, _ := checkSummary(s); f != field {
			t.Errorf("got %q, want %q", f, field)
		}
	}
}

func FuzzCheckRaw(f *testing.F) {
	f.Add(100.0, []byte{1, 2, 3, 4}, []byte{1, 2, 3, 4}, uint8(18))
	f.Add(0.0, []byte{}, []byte{9}, uint8(8))
	f.Add(1e9, []byte{255, 255, 255, 255}, []byte{0, 0, 0, 0}, uint8(24))
	f.Fuzz(func(t *testing.T, rate float64, red, ir []byte, bits uint8) {
		bits = 8 + bits%17
		c := &pulsefleetv1.RawChunk{SampleRateHz: rate}
		for i := 0; i+3 < len(red); i += 4 {
			c.Red = append(c.Red, uint32(red[i])<<24|uint32(red[i+1])<<16|uint32(red[i+2])<<8|uint32(red[i+3]))
		}
		for i := 0; i+3 < len(ir); i += 4 {
			c.Ir = append(c.Ir, uint32(ir[i])<<24|uint32(ir[i+1])<<16|uint32(ir[i+2])<<8|uint32(ir[i+3]))
		}
		top := uint32(1)<<bits - 1
		field, detail := checkRaw(c, top)
		valid := rate >= 25 && rate <= 1000 && len(c.Red) >= 1 && len(c.Red) <= 1000 && len(c.Ir) == len(c.Red)
		for _, v := range append(append([]uint32{}, c.Red...), c.Ir...) {
			valid = valid && v <= top
		}
		if valid != (field == "") {
			t.Fatalf("valid %v but checkRaw said %q %q", valid, field, detail)
		}
		if field != "" && !strings.Contains(detail, "want") {
			t.Fatalf("detail %q names no bound", detail)
		}
	})
}
