package ingest

import (
	"context"
	"math"
	"os"
	"os/exec"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// fuzzNow is the gateway clock of the fuzz targets (device times are checked
// against it).
var fuzzNow = time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC).UnixMilli()

func encodeSeed(m *pb.ConnectRequest) []byte {
	b, err := proto.Marshal(m)
	if err != nil {
		panic(err)
	}
	return b
}

func seedRaw(seq uint64, rate float64, n int, v uint32) *pb.ConnectRequest {
	c := &pb.RawChunk{Sequence: seq, DeviceTimeUnixMs: fuzzNow - 1000, SampleRateHz: rate}
	for i := 0; i < n; i++ {
		c.Red, c.Ir = append(c.Red, v+uint32(i%7)), append(c.Ir, v+uint32(i%5))
	}
	return &pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}}
}

func seedSummary(seq uint64, spo2 float64) *pb.ConnectRequest {
	q, pulse := 0.9, 72.0
	return &pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: seq, DeviceTimeUnixMs: fuzzNow - 1000,
		Spo2Pct: &spo2, PulseBpm: &pulse, Quality: &q}}}
}

// addMessageSeeds adds encoded messages of every kind, good and bad.
func addMessageSeeds(f *testing.F) {
	nan, inf := math.NaN(), math.Inf(1)
	for _, m := range []*pb.ConnectRequest{
		seedRaw(1, 100, 25, 30000),
		seedRaw(2, 1000, 25, 1<<15),
		seedRaw(0, 100, 25, 1),
		seedRaw(3, nan, 25, 1),
		seedRaw(4, 100, 0, 1),
		seedRaw(5, 100, 25, 1<<20),
		seedSummary(1, 97),
		seedSummary(2, nan),
		seedSummary(3, inf),
		seedSummary(4, 101),
		{Kind: &pb.ConnectRequest_Status{Status: &pb.DeviceStatus{BatteryPct: 50, TemperatureC: 30, LinkQuality: 0.5}}},
		{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{DeviceId: "bed-1", Mode: pb.Mode_MODE_RAW, AdcBits: 16}}},
		{},
	} {
		f.Add(encodeSeed(m))
	}
	f.Add([]byte{0xff, 0xff, 0xff})
	f.Add([]byte{})
}

// FuzzValidateRaw: a chunk validateRaw accepts satisfies every documented
// bound; a refused one names a field and says why.
func FuzzValidateRaw(f *testing.F) {
	addMessageSeeds(f)
	f.Fuzz(func(t *testing.T, data []byte) {
		var m pb.ConnectRequest
		if proto.Unmarshal(data, &m) != nil || m.GetRawChunk() == nil {
			return
		}
		c := m.GetRawChunk()
		for _, bits := range []uint32{minADCBits, 16, MaxADCBits} {
			r := validateRaw(c, bits, 1000)
			if r != nil {
				if r.GetField() == "" || r.GetDetail() == "" || r.GetReason() != pb.RejectReason_REJECT_REASON_INVALID_FIELD {
					t.Fatalf("rejection without field, detail or reason: %v", r)
				}
				continue
			}
			n := len(c.GetRed())
			rate := c.GetSampleRateHz()
			if c.GetSequence() == 0 || !(rate >= minRateHz && rate <= maxRateHz) || n < 1 || n > 1000 || len(c.GetIr()) != n ||
				(len(c.GetAmbient()) != 0 && len(c.GetAmbient()) != n) {
				t.Fatalf("accepted a chunk out of bounds: seq %d rate %v n %d ir %d ambient %d", c.GetSequence(), rate, n, len(c.GetIr()), len(c.GetAmbient()))
			}
			limit := uint32(1)<<bits - 1
			for _, ch := range [][]uint32{c.GetRed(), c.GetIr(), c.GetAmbient()} {
				for _, v := range ch {
					if v > limit {
						t.Fatalf("accepted sample %d above %d-bit range", v, bits)
					}
				}
			}
		}
	})
}

// FuzzValidateSummary: an accepted summary has only finite values inside
// their ranges.
func FuzzValidateSummary(f *testing.F) {
	addMessageSeeds(f)
	f.Fuzz(func(t *testing.T, data []byte) {
		var m pb.ConnectRequest
		if proto.Unmarshal(data, &m) != nil || m.GetSummary() == nil {
			return
		}
		s := m.GetSummary()
		if r := validateSummary(s); r != nil {
			if r.GetField() == "" || r.GetDetail() == "" {
				t.Fatalf("rejection without field or detail: %v", r)
			}
			return
		}
		for _, v := range []struct {
			p      *float64
			lo, hi float64
		}{{s.Spo2Pct, 0, 100}, {s.PulseBpm, 0, 350}, {s.PiPct, 0, 100}, {s.Quality, 0, 1}} {
			if v.p != nil && !(*v.p >= v.lo && *v.p <= v.hi) {
				t.Fatalf("accepted %v outside %v..%v", *v.p, v.lo, v.hi)
			}
		}
		if s.GetSequence() == 0 {
			t.Fatal("accepted sequence 0")
		}
	})
}

// FuzzValidateIntroduction: an accepted introduction has a valid id, a
// known mode, wavelengths in range (defaults filled in) and bounded labels;
// validating it again changes nothing.
func FuzzValidateIntroduction(f *testing.F) {
	addMessageSeeds(f)
	f.Add(encodeSeed(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{DeviceId: "bed-1",
		Mode: pb.Mode_MODE_SUMMARY, Labels: map[string]string{"ward": "larkspur", "": "x"}}}}))
	f.Fuzz(func(t *testing.T, data []byte) {
		var m pb.ConnectRequest
		if proto.Unmarshal(data, &m) != nil || m.GetIntroduction() == nil {
			return
		}
		in := m.GetIntroduction()
		if r := validateIntroduction(in); r != nil {
			if !strings.HasPrefix(r.GetField(), "introduction.") || r.GetDetail() == "" {
				t.Fatalf("rejection without field or detail: %v", r)
			}
			return
		}
		if validID("id", in.GetDeviceId()) != nil || len(in.GetLabels()) > maxLabels {
			t.Fatalf("accepted id %q with %d labels", in.GetDeviceId(), len(in.GetLabels()))
		}
		for _, w := range []float64{in.GetRedWavelengthNm(), in.GetIrWavelengthNm()} {
			if !(w >= minWavelength && w <= maxWavelength) {
				t.Fatalf("accepted wavelength %v", w)
			}
		}
		if in.GetMode() == pb.Mode_MODE_RAW && (in.GetAdcBits() < minADCBits || in.GetAdcBits() > MaxADCBits) {
			t.Fatalf("accepted %d ADC bits in raw mode", in.GetAdcBits())
		}
		before := proto.Clone(in)
		if r := validateIntroduction(in); r != nil || !proto.Equal(before, in) {
			t.Fatalf("second validation differs: %v", r)
		}
	})
}

// fuzzPipeline is one real pipeline (real store, running writer) per
// fuzzing process, with a raw and a summary stream that live across inputs,
// as one long hostile stream per mode would.
type fuzzPipeline struct {
	p        *Pipeline
	db       *store.DB
	raw, sum *stream
	wg       sync.WaitGroup
}

func newFuzzPipeline(f *testing.F) *fuzzPipeline {
	db, err := store.Open(f.TempDir(), store.Options{})
	if err != nil {
		f.Fatal(err)
	}
	p, err := New(testConfig(db, func() time.Time { return time.UnixMilli(fuzzNow) }, time.Millisecond,
		Limits{Messages: 1e6, Burst: 1e6, DeviceTime: 1e6, DeviceTimeBurst: 24 * time.Hour}))
	if err != nil {
		f.Fatal(err)
	}
	fg := &fuzzPipeline{p: p, db: db}
	fg.wg.Add(1)
	go func() { defer fg.wg.Done(); p.w.run() }()
	open := func(in *pb.Introduction) *stream {
		ctx, cancel := context.WithCancelCause(context.Background())
		s := &stream{p: p, cancel: cancel, ended: make(chan struct{}), wake: make(chan struct{}, 1)}
		if r := validateIntroduction(in); r != nil {
			f.Fatal(r)
		}
		if err := s.start(ctx, in); err != nil {
			f.Fatal(err)
		}
		return s
	}
	fg.raw = open(&pb.Introduction{DeviceId: "fuzz-raw", Mode: pb.Mode_MODE_RAW, AdcBits: 16})
	fg.sum = open(&pb.Introduction{DeviceId: "fuzz-summary", Mode: pb.Mode_MODE_SUMMARY})
	f.Cleanup(func() {
		for _, s := range []*stream{fg.raw, fg.sum} {
			s.finish(context.Background())
			close(s.ended)
			s.cancel(nil)
		}
		p.w.close()
		fg.wg.Wait()
		if err := db.Check(); err != nil {
			f.Errorf("store integrity after fuzzing: %v", err)
		}
		db.Close()
	})
	return fg
}

// FuzzHandle drives the whole per-message path (size check, rate limit,
// validation, sequence rules, estimator, alarms, store writer) with arbitrary
// bytes decoded as a device message, on a raw and a summary stream. Nothing
// may panic, an error must be one a device can be told (an *Error; the
// gateway maps it to a gRPC status), sequence numbers never go back,
// and the device's latest trend point holds only plausible values.
func FuzzHandle(f *testing.F) {
	addMessageSeeds(f)
	fg := newFuzzPipeline(f)
	f.Fuzz(func(t *testing.T, data []byte) {
		var m pb.ConnectRequest
		if proto.Unmarshal(data, &m) != nil {
			return
		}
		for _, s := range []*stream{fg.raw, fg.sum} {
			s.dev.mu.Lock()
			before := s.dev.cur.LastSeq
			s.dev.mu.Unlock()
			if err := s.handle(context.Background(), proto.Clone(&m).(*pb.ConnectRequest)); err != nil {
				if _, ok := err.(*Error); !ok {
					t.Fatalf("handle: an error a device cannot be told: %v", err)
				}
			}
			s.dev.mu.Lock()
			after := s.dev.cur.LastSeq
			s.dev.mu.Unlock()
			if after < before {
				t.Fatalf("last sequence went back from %d to %d", before, after)
			}
			s.dev.mu.Lock()
			p := s.dev.latest // nil until the first point
			s.dev.mu.Unlock()
			if p != nil && p.Spo2Pct != nil && !(p.GetSpo2Pct() >= 0 && p.GetSpo2Pct() <= 100) {
				t.Fatalf("trend point SpO2 %v", p.GetSpo2Pct())
			}
			if p != nil && p.PulseBpm != nil && !(p.GetPulseBpm() > 0 && p.GetPulseBpm() < 400) {
				t.Fatalf("trend point pulse %v", p.GetPulseBpm())
			}
			clear(s.outq) // what the device would read
			s.outq = s.outq[:0]
		}
	})
}

// TestFuzzHandleBriefly runs real fuzzing of the whole message path for
// $PULSEFLEET_FUZZ_SECONDS seconds (1..600) when that is set; the suite
// leaves it unset and runs only the seed corpora (scripts/fuzz.sh fuzzes
// every target).
func TestFuzzHandleBriefly(t *testing.T) {
	v := os.Getenv("PULSEFLEET_FUZZ_SECONDS")
	if v == "" {
		t.Skip("set PULSEFLEET_FUZZ_SECONDS to fuzz FuzzHandle for that long")
	}
	n, err := strconv.Atoi(v)
	if err != nil || n < 1 || n > 600 {
		t.Fatalf("PULSEFLEET_FUZZ_SECONDS: %q, want 1..600", v)
	}
	cmd := exec.Command("go", "test", "-run", "^$", "-fuzz", "^FuzzHandle$", "-fuzztime", strconv.Itoa(n)+"s", ".")
	out, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("fuzzing FuzzHandle: %v\n%s", err, out)
	}
}
