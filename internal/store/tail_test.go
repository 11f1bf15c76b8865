package store

import (
	"fmt"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"
)

func countTrend(t *testing.T, db *DB, dev string) (n int, last Point) {
	t.Helper()
	if err := db.Trend(dev, 0, 1<<62, func(p Point) bool { n++; last = p; return true }); err != nil {
		t.Fatal(err)
	}
	return n, last
}

func recentGenerations(t *testing.T, db *DB) int {
	n := 0
	db.bolt.View(func(tx *bolt.Tx) error {
		return tx.Bucket(bRecent).ForEachBucket(func([]byte) error { n++; return nil })
	})
	return n
}

// Points not yet compacted survive a close (or a crash: nothing is kept only
// in memory) and are found after reopening.
func TestRecentPointsSurviveReopen(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	b := &Batch{}
	for i := int64(0); i < 30; i++ {
		b.Points = append(b.Points, Point{Device: "bed-a", TimeMS: 1000 * i, SpO2: 95, Pulse: 60})
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if n, _ := countTrend(t, db, "bed-a"); n != 30 {
		t.Fatalf("%d points before reopen, want 30", n)
	}
	db.Close()
	db, err = Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if n, _ := countTrend(t, db, "bed-a"); n != 30 {
		t.Fatalf("%d points after reopen, want 30", n)
	}
}

// A sealed generation is moved device by device over later writes, queries
// see every point throughout, and the generation's bucket is dropped at the
// end. A point written again later is kept out: the first write stays
// (keepfirst.go), wherever the first one is at the time.
func TestCompactionMovesGenerationsAcrossWrites(t *testing.T) {
	db, _ := mustOpen(t)
	const devices = compactPerWrite + 44
	b := &Batch{}
	for d := 0; d < devices; d++ {
		for s := int64(0); s < 5; s++ {
			b.Points = append(b.Points, Point{Device: fmt.Sprintf("d%03d", d), TimeMS: 1000 * s, SpO2: 90})
		}
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	db.tail.genStart = time.Time{} // the generation is old enough: the next write seals it
	for w := 0; w < 3; w++ {
		// Each write tries to rewrite d000's second 4 and adds a new point.
		nb := &Batch{Points: []Point{{Device: "d000", TimeMS: 4000, SpO2: float64(80 + w)}, {Device: "d001", TimeMS: 10_000 + int64(w)*1000, SpO2: 91}}}
		if err := db.Write(nb); err != nil {
			t.Fatal(err)
		}
		if nb.KeptOut != 1 {
			t.Errorf("write %d: KeptOut %d, want 1 (d000 at 4 s)", w, nb.KeptOut)
		}
		for _, dev := range []string{"d000", "d100", fmt.Sprintf("d%03d", devices-1)} {
			if n, _ := countTrend(t, db, dev); n != 5 {
				t.Fatalf("write %d: %s has %d points, want 5", w, dev, n)
			}
		}
	}
	if len(db.tail.sealed) != 0 {
		t.Errorf("%d generations still sealed after %d writes", len(db.tail.sealed), 3)
	}
	if g := recentGenerations(t, db); g != 1 {
		t.Errorf("%d generations in the recent log, want 1 (the current)", g)
	}
	_, last := countTrend(t, db, "d000")
	if last.SpO2 != 90 {
		t.Errorf("d000 at 4 s: %v, want the first write (90)", last.SpO2)
	}
	if n, _ := countTrend(t, db, "d001"); n != 8 {
		t.Errorf("d001: %d points, want 8", n)
	}
	if err := db.CompactAll(); err != nil {
		t.Fatal(err)
	}
	if g := recentGenerations(t, db); g != 0 {
		t.Errorf("%d generations after CompactAll, want 0", g)
	}
	_, last = countTrend(t, db, "d000")
	if last.SpO2 != 90 || len(db.tail.devices()) != 0 {
		t.Errorf("after CompactAll: d000 at 4 s %v, tail devices %d", last.SpO2, len(db.tail.devices()))
	}
}
