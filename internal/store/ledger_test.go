package store

import (
	"errors"
	"testing"
)

func writeChunks(t *testing.T, db *DB, dev string, arrival int64, seqs ...uint64) error {
	t.Helper()
	b := &Batch{Devices: []*Device{{ID: dev, Mode: "raw"}}}
	for _, s := range seqs {
		b.Chunks = append(b.Chunks, Chunk{Device: dev, Seq: s, DeviceTimeMS: arrival - 30, ArrivalMS: arrival, Samples: 25})
		arrival += 250
	}
	return db.Write(b)
}

func seqs(from, to uint64) []uint64 {
	var out []uint64
	for s := from; s <= to; s++ {
		out = append(out, s)
	}
	return out
}

// The ledger as ranges still proves exactly-once: every message is counted
// once, a gap is no message, and a message written twice is found (the
// totals say the sequence numbers are not distinct).
func TestLedgerRangesCountGapsAndRecogniseResends(t *testing.T) {
	db, _ := mustOpen(t)
	t0 := 30*day + 3_600_000
	if err := writeChunks(t, db, "a", t0, seqs(1, 10)...); err != nil {
		t.Fatal(err)
	}
	if err := writeChunks(t, db, "a", t0+5000, seqs(12, 15)...); err != nil { // 11 lost
		t.Fatal(err)
	}
	tot, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if got := tot["a"]; got != (LedgerTotal{Chunks: 14, Samples: 14 * 25, MaxSeq: 15, Distinct: true}) {
		t.Errorf("totals %+v, want 14 messages, 350 samples, max 15, distinct", got)
	}
	st, _ := db.Stats()
	if st.Kind("ledger").Records != 2 || st.Kind("ledger").Items != 14 {
		t.Errorf("ledger: %d records holding %d messages, want 2 ranges holding 14", st.Kind("ledger").Records, st.Kind("ledger").Items)
	}
	for seq, want := range map[uint64]bool{1: true, 10: true, 11: false, 12: true, 15: true, 16: false, 0: false} {
		if got, err := db.LedgerHas("a", seq); err != nil || got != want {
			t.Errorf("LedgerHas(a, %d) = %v, %v; want %v", seq, got, err, want)
		}
	}
	if got, err := db.LedgerHas("nobody", 1); err != nil || got {
		t.Errorf("LedgerHas of an unknown device: %v, %v", got, err)
	}
	// A message already stored, written again (a defect above the store):
	// kept, and the totals say so.
	if err := writeChunks(t, db, "a", t0+9000, 5); err != nil {
		t.Fatal(err)
	}
	if err := writeChunks(t, db, "a", t0+9500, 5); err != nil {
		t.Fatal(err)
	}
	tot, _ = db.LedgerTotals()
	if got := tot["a"]; got.Distinct || got.Chunks != 16 {
		t.Errorf("after writing message 5 twice more: %+v, want 16 messages, not distinct", got)
	}
}

// A range extends across Open and a new day starts a new range; a write
// that fails leaves the range as it was, so the message written again
// extends it once.
func TestLedgerRangeSurvivesReopenAndFailedWrites(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	t0 := 40*day - 2000 // two messages before midnight, the rest after
	if err := writeChunks(t, db, "b", t0, seqs(1, 2)...); err != nil {
		t.Fatal(err)
	}
	db.InjectWriteFault(func(*Batch) error { return errors.New("injected") })
	if err := writeChunks(t, db, "b", t0+1000, 3); err == nil {
		t.Fatal("injected fault: write succeeded")
	}
	db.InjectWriteFault(nil)
	if err := writeChunks(t, db, "b", t0+1000, 3); err != nil {
		t.Fatal(err)
	}
	db.Close()
	if db, err = Open(dir, Options{}); err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if err := writeChunks(t, db, "b", t0+1500, 4); err != nil { // same day: extends 1..3
		t.Fatal(err)
	}
	if err := writeChunks(t, db, "b", t0+2500, seqs(5, 9)...); err != nil { // after midnight: a new range
		t.Fatal(err)
	}
	tot, _ := db.LedgerTotals()
	if got := tot["b"]; got != (LedgerTotal{Chunks: 9, Samples: 9 * 25, MaxSeq: 9, Distinct: true}) {
		t.Errorf("totals %+v", got)
	}
	st, _ := db.Stats()
	if st.Kind("ledger").Records != 2 {
		t.Errorf("%d ledger records, want 2 (one range per arrival day)", st.Kind("ledger").Records)
	}
	if err := db.Check(); err != nil {
		t.Fatal(err)
	}
}
