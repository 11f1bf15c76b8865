package sim

import (
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim/scenario"
)

// benchDevice is a device of a one-device fleet that is never connected.
func benchDevice(b *testing.B, mode Mode) *device {
	sc := scenario.Generic(1, "b", 1)
	f := &fleet{opts: Options{Gateway: "127.0.0.1:1", Mode: mode}, sc: sc, speed: 1, rate: 100, chunk: 25, maxBuf: 6000, t0: time.Now()}
	d, err := newDevice(f, 0, &sc.Devices[0], time.Hour, nil)
	if err != nil {
		b.Fatal(err)
	}
	return d
}

// The client's per-chunk cost without the network: patient state, PPG
// model, conversion to codes, buffering and recycling. It must not allocate.
func BenchmarkRawChunk(b *testing.B) {
	d := benchDevice(b, ModeRaw)
	b.ReportAllocs()
	for b.Loop() {
		ts := time.Duration(float64(d.k) * d.chunkDur * float64(time.Second))
		st := d.track.At(ts)
		d.generate(&st)
		d.onAck(d.nextSeq - 1)
		d.k++
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/25, "ns/sample")
}

func BenchmarkSummary(b *testing.B) {
	d := benchDevice(b, ModeSummary)
	b.ReportAllocs()
	for b.Loop() {
		st := d.track.At(time.Duration(d.k) * time.Second)
		d.generate(&st)
		d.onAck(d.nextSeq - 1)
		d.k++
	}
}

func BenchmarkHistogramRecord(b *testing.B) {
	var h Histogram
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		h.Record(time.Duration(i%100000) * time.Microsecond)
		i++
	}
}
