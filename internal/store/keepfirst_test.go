package store

import (
	"fmt"
	"math"
	"testing"

	bolt "go.etcd.io/bbolt"
)

// Stored history is never rewritten (internal/store/doc.go, "Keep the first"): a
// trend point at a device time the store already holds for that device is
// not written, whether the first one is in the same batch, in the recent
// log, or already moved to the per-device buckets, and also after a
// reopen. The count of points kept out is reported in the batch.
func TestTrendKeepsTheFirstPointAtEachTime(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	const dev = "bed-7"
	t0 := 40*day + 1000
	pt := func(i int64, spo2 float64) Point {
		return Point{Device: dev, TimeMS: t0 + i*1000, SpO2: spo2, Pulse: 70, PI: 1, SQI: 0.9, Ratio: math.NaN(), Source: 1}
	}
	b := &Batch{Devices: []*Device{{ID: dev}}}
	for i := int64(0); i < 10; i++ {
		b.Points = append(b.Points, pt(i, 95))
	}
	b.Points = append(b.Points, pt(3, 60)) // the same time twice in one batch
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if b.KeptOut != 1 {
		t.Errorf("first batch: KeptOut %d, want 1", b.KeptOut)
	}
	// Resent times while the first points are still in the recent log.
	b = &Batch{Points: []Point{pt(2, 61), pt(9, 62), pt(10, 96)}}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if b.KeptOut != 2 {
		t.Errorf("resend into the recent log: KeptOut %d, want 2", b.KeptOut)
	}
	// Resent times after they moved to the per-device buckets.
	if err := db.CompactAll(); err != nil {
		t.Fatal(err)
	}
	b = &Batch{Points: []Point{pt(0, 63), pt(5, 64), pt(11, 97)}}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if b.KeptOut != 2 {
		t.Errorf("resend into the compacted buckets: KeptOut %d, want 2", b.KeptOut)
	}
	check := func(db *DB, when string) {
		var got []Point
		if err := db.Trend(dev, 0, math.MaxInt64, func(p Point) bool { got = append(got, p); return true }); err != nil {
			t.Fatal(err)
		}
		if len(got) != 13 {
			t.Fatalf("%s: %d points, want 13", when, len(got))
		}
		for i, p := range got {
			want := 95.0
			switch i {
			case 10:
				want = 96
			case 11:
				want = 97
			case 12:
				want = 98
			}
			if p.TimeMS != t0+int64(i)*1000 || p.SpO2 != want {
				t.Errorf("%s: point %d = %d ms %v %%, want %d ms %v %% (the first value)", when, i, p.TimeMS-t0, p.SpO2, int64(i)*1000, want)
			}
		}
	}
	// A batch that fails to commit keeps nothing out later: its times are
	// not stored, so the resend is written (with whatever values it has).
	db.InjectWriteFault(func(*Batch) error { return ErrInjected })
	if err := db.Write(&Batch{Points: []Point{pt(12, 50)}}); err == nil {
		t.Fatal("write with an injected fault succeeded")
	}
	db.InjectWriteFault(nil)
	b = &Batch{Points: []Point{pt(12, 98)}}
	if err := db.Write(b); err != nil || b.KeptOut != 0 {
		t.Fatalf("resend after a failed batch: err %v, KeptOut %d, want written", err, b.KeptOut)
	}
	check(db, "before reopen")
	if err := db.Check(); err != nil {
		t.Errorf("integrity: %v", err)
	}
	db.Close()
	db2, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer func() {
		if err := db2.Check(); err != nil {
			t.Errorf("integrity: %v", err)
		}
		db2.Close()
	}()
	b = &Batch{Points: []Point{pt(1, 65), pt(11, 66)}}
	if err := db2.Write(b); err != nil {
		t.Fatal(err)
	}
	if b.KeptOut != 2 {
		t.Errorf("resend after reopen: KeptOut %d, want 2", b.KeptOut)
	}
	check(db2, "after reopen")
}

// BenchmarkKeepFirstInOrder measures the keep-the-first check on the common
// path (each device's points later than its newest stored one): ns per point.
func BenchmarkKeepFirstInOrder(b *testing.B) {
	db, _ := mustOpen(b)
	const devices = 5000
	pts := make([]Point, devices)
	for i := range pts {
		pts[i] = Point{Device: fmt.Sprintf("dev-%04d", i), TimeMS: 1000, SpO2: 97}
	}
	if err := db.Write(&Batch{Points: append([]Point(nil), pts...)}); err != nil {
		b.Fatal(err)
	}
	b.ResetTimer()
	err := db.bolt.View(func(tx *bolt.Tx) error {
		for i := 0; i < b.N; i += devices {
			for j := range pts {
				pts[j].TimeMS = 2000 + int64(i)
			}
			if _, n := db.keepFirst(tx, pts); n != 0 {
				b.Fatalf("kept out %d in-order points", n)
			}
		}
		return nil
	})
	if err != nil {
		b.Fatal(err)
	}
}
