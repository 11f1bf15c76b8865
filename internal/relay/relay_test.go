package relay

import (
	"math"
	"testing"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Each kind of bad line gets its reason; good lines in every separator
// style parse to the same codes; a header names the columns in any order.
func TestParserReasonsAndFormats(t *testing.T) {
	p, err := NewParser(Raw, nil, 16)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		line   string
		reason string
		red    uint32
	}{
		{"1000,2000", "", 1000},
		{"1001;2000", "", 1001},
		{"1002\t2000", "", 1002},
		{"  1003   2000 \r", "", 1003},
		{"1004.4,2000", "", 1004}, // rounded to the nearest code
		{"1000", ReasonFields, 0},
		{"1000,2000,3000", ReasonFields, 0},
		{"10x0,2000", ReasonNumber, 0},
		{"NaN,2000", ReasonNumber, 0},
		{"65536,2000", ReasonRange, 0}, // 16-bit: 0..65535
		{"-1,2000", ReasonRange, 0},
		{string(make([]byte, MaxLineBytes+1)), ReasonTooLong, 0},
	} {
		s, ok, reason, header, err := p.Parse([]byte(c.line))
		if err != nil || header {
			t.Fatalf("%q: header %v, err %v", c.line, header, err)
		}
		if reason != c.reason || ok != (c.reason == "") || (ok && (s.Red != c.red || s.IR != 2000)) {
			t.Errorf("%q: ok %v reason %q red %d ir %d; want reason %q red %d", c.line, ok, reason, s.Red, s.IR, c.reason, c.red)
		}
	}
	if _, ok, reason, _, _ := p.Parse([]byte("   ")); ok || reason != "" {
		t.Errorf("an empty line: ok %v reason %q, want skipped", ok, reason)
	}

	h, _ := NewParser(Raw, nil, 18)
	if _, ok, reason, _, _ := h.Parse([]byte("# a comment")); ok || reason != "" {
		t.Errorf("a comment: ok %v reason %q, want skipped", ok, reason)
	}
	if _, ok, reason, header, err := h.Parse([]byte("proto fw 0.3 booting")); ok || header || err != nil || reason != ReasonNumber {
		t.Errorf("a banner before the header: ok %v header %v err %v reason %q, want rejected as %s", ok, header, err, reason, ReasonNumber)
	}
	if _, _, _, header, err := h.Parse([]byte("t_ms,ir,red,ambient,temp")); !header || err != nil {
		t.Fatalf("header: %v %v", header, err)
	}
	s, ok, _, _, _ := h.Parse([]byte("5000,200,100,7,31.5"))
	if !ok || s.Red != 100 || s.IR != 200 || s.Ambient != 7 || !s.HasAmbient || s.TimeMS != 5000 {
		t.Errorf("header order: %+v", s)
	}
	if _, ok, reason, _, _ := h.Parse([]byte("5000,200,100,7,31.5")); ok || reason != ReasonTime {
		t.Errorf("repeated time: ok %v reason %q, want %s", ok, reason, ReasonTime)
	}
	if s, ok, _, _, _ := h.Parse([]byte("10,200,100,7,31.5")); !ok || !s.Restart {
		t.Errorf("time back by more than a second: ok %v restart %v, want a device restart", ok, s.Restart)
	}
	if _, _, _, header, err := (&Parser{}).mustNew(t, Raw).Parse([]byte("green,ir")); !header || err == nil {
		t.Errorf("a header without red: header %v err %v, want an error naming the columns", header, err)
	}

	sp, _ := NewParser(Summary, []string{"spo2", "pulse", "pi", "sqi"}, 16)
	s, ok, _, _, _ = sp.Parse([]byte("97,,1.5,0.9"))
	if !ok || s.SpO2 != 97 || !math.IsNaN(s.Pulse) || s.PI != 1.5 || s.Q != 0.9 {
		t.Errorf("summary with an empty pulse: %+v ok %v", s, ok)
	}
	for _, l := range []string{"101,60,1,0.9", "97,400,1,0.9", "97,60,1,1.5"} {
		if _, ok, reason, _, _ := sp.Parse([]byte(l)); ok || reason != ReasonRange {
			t.Errorf("%q: reason %q, want %s", l, reason, ReasonRange)
		}
	}
	if _, err := NewParser(Raw, []string{"red", "infrared"}, 16); err == nil {
		t.Error("--columns with an unknown name: no error")
	}
}

func (*Parser) mustNew(t *testing.T, f Format) *Parser {
	p, err := NewParser(f, nil, 16)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

func raw(c Chunk) *pb.RawChunk { return c.Msg.GetRawChunk() }

// Samples without a time column are stamped anchor + k / rate and grouped
// in chunks of one second; a recording's chunks are contiguous in device
// time (the gateway's estimator runs on without a restart).
func TestAssemblerStampsByRate(t *testing.T) {
	a := NewAssembler(AssemblerConfig{Format: Raw, RateHz: 100, AnchorMS: 1_700_000_000_000}, nil)
	var chunks []Chunk
	at := time.Now()
	for i := 0; i < 250; i++ {
		chunks = append(chunks, a.Add(Sample{Red: uint32(i), IR: 1, TimeMS: math.NaN()}, int64(i+1)*10, at)...)
	}
	chunks = append(chunks, a.Flush(true)...)
	if len(chunks) != 3 || chunks[0].Samples != 100 || chunks[2].Samples != 50 {
		t.Fatalf("%d chunks, want 100+100+50 samples", len(chunks))
	}
	for i, c := range chunks {
		if got, want := raw(c).DeviceTimeUnixMs, int64(1_700_000_000_000+i*1000); got != want {
			t.Errorf("chunk %d at %d, want %d", i, got, want)
		}
	}
	if m := chunks[1].Mark; m.Offset != 2000 || m.K != 199 {
		t.Errorf("mark after chunk 1: %+v, want offset 2000 and k 199", m)
	}
	if a.Gaps() != 0 {
		t.Errorf("gaps %d", a.Gaps())
	}
}

// A time column places samples; a jump of more than 2.5 sample periods is a
// gap that starts a new chunk at the new time; an absolute Unix time is
// kept; the rate is inferred from the first 256 times when not declared.
func TestAssemblerTimeColumnGapsAndInference(t *testing.T) {
	a := NewAssembler(AssemblerConfig{Format: Raw, AnchorMS: 1_700_000_000_000}, nil)
	var chunks []Chunk
	at := time.Now()
	tm := 0.0
	for i := 0; i < 400; i++ {
		if i == 300 {
			tm += 2000 // two seconds missing
		}
		chunks = append(chunks, a.Add(Sample{Red: 5, IR: 6, TimeMS: tm}, int64(i), at)...)
		tm += 4 // 250 Hz
	}
	chunks = append(chunks, a.Flush(true)...)
	if a.RateHz() != 250 {
		t.Fatalf("inferred rate %v Hz, want 250", a.RateHz())
	}
	if a.Gaps() != 1 {
		t.Errorf("gaps %d, want 1", a.Gaps())
	}
	var total int
	for _, c := range chunks {
		total += c.Samples
	}
	last := raw(chunks[len(chunks)-1])
	if total != 400 || last.DeviceTimeUnixMs != 1_700_000_000_000+300*4+2000 || len(last.Red) != 100 {
		t.Errorf("%d samples; last chunk at %d with %d samples, want the gap's new run at %d", total, last.DeviceTimeUnixMs, len(last.Red), int64(1_700_000_000_000+300*4+2000))
	}

	abs := NewAssembler(AssemblerConfig{Format: Summary, AnchorMS: 5}, nil)
	c := abs.Add(Sample{SpO2: 97, Pulse: math.NaN(), PI: 1, Q: math.NaN(), TimeMS: 1_750_000_000_123}, 1, at)
	if len(c) != 1 || c[0].Msg.GetSummary().GetDeviceTimeUnixMs() != 1_750_000_000_123 || c[0].Msg.GetSummary().PulseBpm != nil {
		t.Errorf("absolute summary time: %+v", c)
	}
}

// A live source's lines that fall more than LiveGapAfter behind the rate
// set the clock forward to their arrival, counted as a gap.
func TestAssemblerLiveStallIsAGap(t *testing.T) {
	a := NewAssembler(AssemblerConfig{Format: Raw, RateHz: 100, Live: true}, nil)
	t0 := time.UnixMilli(1_700_000_000_000)
	a.Add(Sample{TimeMS: math.NaN()}, 0, t0)
	a.Add(Sample{TimeMS: math.NaN()}, 0, t0.Add(10*time.Millisecond))
	out := a.Add(Sample{TimeMS: math.NaN()}, 0, t0.Add(LiveGapAfter+time.Second))
	if a.Gaps() != 1 || len(out) != 1 || len(raw(out[0]).Red) != 2 {
		t.Fatalf("gaps %d, chunks %d; want the stall to end the first chunk", a.Gaps(), len(out))
	}
	if m := a.Mark(); m.LastMS != float64(t0.Add(LiveGapAfter+time.Second).UnixMilli()) {
		t.Errorf("clock after the stall at %v, want the arrival", m.LastMS)
	}
}

// A live source whose lines come faster than the declared rate (or whose
// board clock runs fast) is pulled back to the arrival time: no message is
// stamped after its first sample arrived, and message times still increase.
func TestAssemblerLiveNeverAheadOfArrival(t *testing.T) {
	a := NewAssembler(AssemblerConfig{Format: Raw, RateHz: 100, Live: true, MaxChunk: 25}, nil)
	t0 := time.UnixMilli(1_700_000_000_000)
	var chunks []Chunk
	var arrivals []time.Time
	for i := 0; i < 400; i++ {
		at := t0.Add(time.Duration(i) * 5 * time.Millisecond) // 200 lines/s against a declared 100 Hz
		if i%25 == 0 {
			arrivals = append(arrivals, at)
		}
		chunks = append(chunks, a.Add(Sample{TimeMS: math.NaN()}, 0, at)...)
	}
	prev := int64(0)
	for i, c := range chunks {
		st := raw(c).DeviceTimeUnixMs
		if st > arrivals[i].UnixMilli() || st <= prev {
			t.Errorf("chunk %d at %d: first sample arrived at %d, previous chunk at %d", i, st, arrivals[i].UnixMilli(), prev)
		}
		prev = st
	}
}

// Lines that all arrive at once (a burst after a stall) still give
// messages with strictly increasing device times.
func TestAssemblerBurstKeepsTimesIncreasing(t *testing.T) {
	a := NewAssembler(AssemblerConfig{Format: Raw, RateHz: 100, Live: true}, nil)
	at := time.Unix(1_700_000_000, 123_456_789)
	var chunks []Chunk
	for i := 0; i < 1000; i++ {
		chunks = append(chunks, a.Add(Sample{TimeMS: math.NaN()}, 0, at)...)
	}
	prev := int64(0)
	for i, c := range chunks {
		st := raw(c).DeviceTimeUnixMs
		if st <= prev || st > at.UnixMilli()+int64(i)+1 {
			t.Errorf("chunk %d at %d after %d (arrival %d)", i, st, prev, at.UnixMilli())
		}
		prev = st
	}
}
