package store

import (
	"reflect"
	"sort"
	"testing"
)

func sortedRanges(t *testing.T, db *DB, dev string) [][2]uint64 {
	t.Helper()
	all, err := db.LedgerRanges()
	if err != nil {
		t.Fatal(err)
	}
	rs := all[dev]
	sort.Slice(rs, func(i, j int) bool { return rs[i][0] < rs[j][0] })
	return rs
}

// A gateway of a fleet drops its copy of messages another gateway holds:
// the ledger keeps exactly the rest, across a reopen, and the device's
// next message is recorded after the cut (not appended to a range that no
// longer ends where the writer last saw it).
func TestDropMessagesTrimsTheLedger(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	t0 := 30*day + 3_600_000
	if err := writeChunks(t, db, "a", t0, seqs(1, 10)...); err != nil {
		t.Fatal(err)
	}
	if err := writeChunks(t, db, "b", t0, seqs(1, 3)...); err != nil {
		t.Fatal(err)
	}
	newest, err := db.LedgerNewest()
	if err != nil {
		t.Fatal(err)
	}
	if h := newest["a"]; h.First != 1 || h.Last != 10 || h.FirstArrMS != t0 || h.LastArrMS != t0+9*250 {
		t.Errorf("newest range of a: %+v, want 1..10 arriving %d..%d", h, t0, t0+9*250)
	}
	held, err := db.LedgerHeld("a", 8, 20)
	if err != nil || len(held) != 1 || held[0].First != 8 || held[0].Last != 10 {
		t.Fatalf("held 8..20: %+v, %v; want 8..10", held, err)
	}
	if n, err := db.DropMessages("a", 8, 12); err != nil || n != 3 {
		t.Fatalf("drop 8..12: %d, %v; want 3 dropped", n, err)
	}
	if got := sortedRanges(t, db, "a"); !reflect.DeepEqual(got, [][2]uint64{{1, 7}}) {
		t.Errorf("after dropping 8..12: %v, want [[1 7]]", got)
	}
	if err := writeChunks(t, db, "a", t0+10_000, 13, 14); err != nil {
		t.Fatal(err)
	}
	if n, err := db.DropMessages("a", 3, 4); err != nil || n != 2 {
		t.Fatalf("drop 3..4: %d, %v; want 2", n, err)
	}
	want := [][2]uint64{{1, 2}, {5, 7}, {13, 14}}
	if got := sortedRanges(t, db, "a"); !reflect.DeepEqual(got, want) {
		t.Errorf("after dropping 3..4: %v, want %v", got, want)
	}
	if got := sortedRanges(t, db, "b"); !reflect.DeepEqual(got, [][2]uint64{{1, 3}}) {
		t.Errorf("another device touched: %v", got)
	}
	tot, _ := db.LedgerTotals()
	if tot["a"].Chunks != 7 || !tot["a"].Distinct {
		t.Errorf("totals of a %+v, want 7 distinct messages", tot["a"])
	}
	db.Close()
	db2, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db2.Close()
	if got := sortedRanges(t, db2, "a"); !reflect.DeepEqual(got, want) {
		t.Errorf("after reopening: %v, want %v", got, want)
	}
	if n, err := db2.DropMessages("nobody", 1, 5); err != nil || n != 0 {
		t.Errorf("unknown device: %d, %v", n, err)
	}
}
