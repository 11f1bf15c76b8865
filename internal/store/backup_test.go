package store

import (
	"bytes"
	"errors"
	"os"
	"path/filepath"
	"sync"
	"sync/atomic"
	"testing"
	"time"
)

// A snapshot taken while a writer commits passes the full check and holds
// every batch committed before it began; restored into a new directory it
// opens as the same store, and the restore keeps the old file aside.
func TestSnapshotUnderWritesAndRestore(t *testing.T) {
	db, _ := mustOpen(t)
	write := func(seq uint64) error {
		return db.Write(&Batch{Devices: []*Device{{ID: "dev-a"}},
			Cursors: []Cursor{{Device: "dev-a", LastSeq: seq, Chunks: seq}},
			Chunks:  []Chunk{{Device: "dev-a", Seq: seq, ArrivalMS: int64(seq) * 1000}},
			Points:  []Point{{Device: "dev-a", TimeMS: int64(seq) * 1000, SpO2: 97, Pulse: 70, PI: 2, SQI: 1, Ratio: 0.5, Source: 1}}})
	}
	var seq atomic.Uint64
	for i := 0; i < 200; i++ {
		if err := write(seq.Add(1)); err != nil {
			t.Fatal(err)
		}
	}
	stop := make(chan struct{})
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { // the live writer goes on during the snapshot
		defer wg.Done()
		for {
			select {
			case <-stop:
				return
			default:
			}
			if err := write(seq.Add(1)); err != nil {
				t.Error(err)
				return
			}
		}
	}()
	var before uint64
	var buf bytes.Buffer
	n, err := db.Snapshot(&buf, func(info SnapshotInfo) error {
		before = seq.Load() - 1 // the batch being written may not have committed
		if info.StoreID != db.ID() || info.Size <= 0 {
			t.Errorf("snapshot info %+v", info)
		}
		time.Sleep(20 * time.Millisecond) // let the writer commit during the copy
		return nil
	})
	close(stop)
	wg.Wait()
	if err != nil || n != int64(buf.Len()) {
		t.Fatalf("snapshot: %d bytes, %v", n, err)
	}
	out := filepath.Join(t.TempDir(), "snap.db")
	bf, err := CreateBackupFile(out)
	if err != nil {
		t.Fatal(err)
	}
	bf.Write(buf.Bytes())
	if _, err := bf.Commit(""); err != nil {
		t.Fatal(err)
	}
	if fi, err := os.Stat(out); err != nil || fi.Mode().Perm() != 0o600 {
		t.Fatalf("backup file: %v %v", fi, err)
	}
	if sum, err := ReadChecksumFile(out); err != nil || sum != bf.Sum() {
		t.Fatalf("checksum file: %q %v, want %s", sum, err, bf.Sum())
	}
	rep, err := VerifyFile(out, VerifyOptions{})
	if err != nil || !rep.OK() {
		t.Fatalf("snapshot fails the full check: %v %v", err, rep.Problems)
	}

	dir := t.TempDir()
	res, err := Restore(dir, out, VerifyOptions{}, time.Now())
	if err != nil {
		t.Fatal(err)
	}
	if res.StoreID != db.ID() || res.KeptAside != "" {
		t.Errorf("restore result %+v", res)
	}
	r, err := Open(dir, Options{})
	if err != nil {
		t.Fatalf("restored store does not open: %v", err)
	}
	tot, err := r.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if a := tot["dev-a"]; a.MaxSeq < before || !a.Distinct || a.Chunks != a.MaxSeq {
		t.Errorf("snapshot holds %+v, want every one of the %d messages committed before it began", a, before)
	}
	// Restoring again over a running store is refused (its lock is held).
	if _, err := Restore(dir, out, VerifyOptions{}, time.Now()); !errors.Is(err, ErrLocked) {
		t.Errorf("restore over an open store: %v, want ErrLocked", err)
	}
	r.Close()
	// Over a stopped store: the old file is kept aside.
	res, err = Restore(dir, out, VerifyOptions{}, time.Now().Add(time.Second))
	if err != nil || res.KeptAside == "" {
		t.Fatalf("second restore: %+v %v", res, err)
	}
	if _, err := os.Stat(res.KeptAside); err != nil {
		t.Error(err)
	}
}

// A snapshot that fails the check or its checksum changes nothing.
func TestRestoreRefusesBadSnapshots(t *testing.T) {
	db, _ := mustOpen(t)
	if err := db.Write(&Batch{Devices: []*Device{{ID: "x"}}, Cursors: []Cursor{{Device: "x", LastSeq: 1, Chunks: 1}}, Chunks: []Chunk{{Device: "x", Seq: 1, ArrivalMS: 1}}}); err != nil {
		t.Fatal(err)
	}
	src := filepath.Join(t.TempDir(), "b.db")
	bf, _ := CreateBackupFile(src)
	if _, err := db.Snapshot(bf, nil); err != nil {
		t.Fatal(err)
	}
	if _, err := bf.Commit(""); err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	// Wrong checksum file.
	os.WriteFile(src+ChecksumSuffix, []byte(string(bytes.Repeat([]byte("0"), 64))+"  b.db\n"), 0o600)
	if _, err := Restore(dir, src, VerifyOptions{}, time.Now()); err == nil {
		t.Error("a checksum mismatch must be refused")
	}
	// Truncated file, no checksum file.
	os.Remove(src + ChecksumSuffix)
	b, _ := os.ReadFile(src)
	os.WriteFile(src, b[:len(b)/2], 0o600)
	if _, err := Restore(dir, src, VerifyOptions{}, time.Now()); err == nil {
		t.Error("a truncated snapshot must be refused")
	}
	if ents, _ := os.ReadDir(dir); len(ents) != 0 {
		t.Errorf("a refused restore left %d entries in the data directory", len(ents))
	}
	// An aborted backup leaves nothing under its name.
	out := filepath.Join(t.TempDir(), "c.db")
	bf, _ = CreateBackupFile(out)
	bf.Write([]byte("partial"))
	bf.Abort()
	if ents, _ := os.ReadDir(filepath.Dir(out)); len(ents) != 0 {
		t.Errorf("an aborted backup left %v", ents)
	}
}

// TrendSliced yields exactly what Trend yields, in slices of a few points
// (one read transaction each), across days and with the tail merged in.
func TestTrendSlicedEqualsTrend(t *testing.T) {
	db, _ := mustOpen(t)
	var pts []Point
	for i := int64(0); i < 50; i++ {
		pts = append(pts, Point{Device: "s", TimeMS: i * 3_600_000, SpO2: 90 + float64(i%7), Pulse: 60, Source: 2})
	}
	if err := db.Write(&Batch{Devices: []*Device{{ID: "s"}}, Points: pts}); err != nil {
		t.Fatal(err)
	}
	var whole, sliced []Point
	db.Trend("s", 0, 1<<62, func(p Point) bool { whole = append(whole, p); return true })
	for _, per := range []int{1, 3, 7, 50, 0} {
		sliced = sliced[:0]
		if err := db.TrendSliced("s", 0, 1<<62, per, func(p Point) bool { sliced = append(sliced, p); return true }); err != nil {
			t.Fatal(err)
		}
		if len(sliced) != len(whole) || len(whole) != 50 {
			t.Fatalf("per %d: %d points sliced, %d whole, want 50", per, len(sliced), len(whole))
		}
		for i := range whole {
			if sliced[i].TimeMS != whole[i].TimeMS || sliced[i].SpO2 != whole[i].SpO2 {
				t.Fatalf("per %d: point %d differs", per, i)
			}
		}
	}
	n := 0
	db.TrendSliced("s", 0, 1<<62, 4, func(Point) bool { n++; return n < 10 })
	if n != 10 {
		t.Errorf("stopping after 10 points gave %d", n)
	}
}
