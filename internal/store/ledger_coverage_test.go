package store

import (
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
