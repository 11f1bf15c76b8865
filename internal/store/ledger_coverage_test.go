package store

import (
	"fmt"
	"reflect"
	"testing"
)

// Coverage names the sequence numbers held, merged: a hole stays a hole, a
// message stored twice and ranges that touch (a new day, a resend) merge,
// and the device times are those of each span's first and last message.
func TestLedgerCoverageMergesSpansAndKeepsHoles(t *testing.T) {
	db, _ := mustOpen(t)
	t0 := 30*day + 3_600_000
	for _, w := range []struct {
		dev     string
		arrival int64
		seqs    []uint64
	}{
		{"a", t0, seqs(1, 10)},
		{"a", t0 + 5000, seqs(14, 15)},   // 11..13 elsewhere
		{"a", t0 + 9000, []uint64{5}},    // stored twice
		{"a", t0 + day, seqs(16, 18)},    // a new day: a new range that touches
		{"b", t0 + 20_000, seqs(40, 41)}, // 1..39 elsewhere
	} {
		if err := writeChunks(t, db, w.dev, w.arrival, w.seqs...); err != nil {
			t.Fatal(err)
		}
	}
	cov, err := db.LedgerCoverage()
	if err != nil {
		t.Fatal(err)
	}
	want := map[string][]SeqSpan{
		"a": {{1, 10, t0 - 30, t0 - 30 + 9*250}, {14, 18, t0 + 5000 - 30, t0 + day - 30 + 2*250}},
		"b": {{40, 41, t0 + 20_000 - 30, t0 + 20_000 - 30 + 250}},
	}
	if !reflect.DeepEqual(cov, want) {
		t.Errorf("coverage\n got %+v\nwant %+v", cov, want)
	}
	only, err := db.LedgerCoverage("b", "nobody")
	if err != nil || len(only) != 1 || len(only["b"]) != 1 {
		t.Errorf("coverage of b and an unknown device: %+v, %v; want b only", only, err)
	}
}

// BenchmarkLedgerCoverage is what a merged history query with a gateway
// down costs each reachable gateway: the coverage of 3,000 devices with a
// week of ledger (one range per device and day, every device with one hole).
func BenchmarkLedgerCoverage(b *testing.B) {
	db, _ := mustOpen(b)
	const devices, days = 3000, 7
	t0 := 30*day + 3_600_000
	var devs []*Device
	for i := 0; i < devices; i++ {
		devs = append(devs, &Device{ID: fmt.Sprintf("bench-%04d", i), Mode: "summary"})
	}
	for d := 0; d < days; d++ {
		batch := &Batch{Devices: devs}
		for i := 0; i < devices; i++ {
			seq := uint64(d*10 + 1)
			if d == 3 {
				seq += 5 // a hole
			}
			for k := uint64(0); k < 2; k++ {
				batch.Chunks = append(batch.Chunks, Chunk{Device: devs[i].ID, Seq: seq + k, DeviceTimeMS: t0 + int64(d)*day, ArrivalMS: t0 + int64(d)*day, Samples: 1})
			}
		}
		if err := db.Write(batch); err != nil {
			b.Fatal(err)
		}
	}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		cov, err := db.LedgerCoverage()
		if err != nil || len(cov) != devices {
			b.Fatalf("%d devices, %v", len(cov), err)
		}
	}
}
