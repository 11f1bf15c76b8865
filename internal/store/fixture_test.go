package store

import (
	"compress/gzip"
	"flag"
	"io"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"testing"
)

// The fixture store testdata/store-release-1 was written by the release
// whose values are all format version 1 (one ledger record per message,
// one trend record per point, raw captures of 32-bit samples), with
//
//	go test ./internal/store -run TestMakeFixture -make-fixture testdata/store-release-1
//	gzip -9 internal/store/testdata/store-release-1/pulsefleet.db
//
// at the commit that added this file. TestOpenStoreOfRelease1 opens a copy
// with the current code and reads every kind back: a store of that release
// must keep opening and reading the same after any change of encoding.

var makeFixture = flag.String("make-fixture", "", "write the fixture store into this directory (see fixture_test.go)")

// fixtureStart is 100 s before a midnight (UTC), so trend, raw and ledger
// records fall into two day buckets.
const fixtureStart = 19_700*day - 100_000

// fixtureRaw is a deterministic 16-bit PPG-like integer signal (no floating
// point, so every machine computes the same codes).
func fixtureRaw(seq uint64, n int) (red, ir []uint32) {
	x := uint32(seq*2654435761 + 12345)
	for i := 0; i < n; i++ {
		x = x*1664525 + 1013904223
		k := int(seq)*n + i
		tri := uint32(k % 80)
		if tri > 40 {
			tri = 80 - tri
		}
		red = append(red, 30000+tri*12+(x>>29))
		ir = append(ir, 32000+tri*20+((x>>26)&7))
	}
	return red, ir
}

// fixtureBatches is what the fixture store holds, batch by batch.
func fixtureBatches() []*Batch {
	raw := &Device{ID: "fx-raw", Mode: "raw", Model: "proto-2", ADCBits: 16, RedNM: 660, IRNM: 940, BatteryPct: 80, FirstSeenMS: fixtureStart}
	sum := &Device{ID: "fx-sum", Mode: "summary", BatteryPct: -1, FirstSeenMS: fixtureStart}
	var out []*Batch
	seq := uint64(0)
	for s := int64(0); s < 200; s++ { // 200 s, one batch per second
		b := &Batch{}
		if s == 0 {
			b.Devices = []*Device{raw, sum}
			b.Sessions = []Session{{Device: raw.ID, StartMS: fixtureStart, Remote: "127.0.0.1:5000", Mode: "raw"},
				{Device: sum.ID, StartMS: fixtureStart, Mode: "summary"}}
		}
		t := fixtureStart + s*1000
		for q := 0; q < 4; q++ { // four 25-sample chunks of 100 Hz per second
			seq++
			if seq == 50 {
				seq++ // a lost message: the ledger has a gap
			}
			dt := t + int64(q)*250
			b.Chunks = append(b.Chunks, Chunk{Device: raw.ID, Seq: seq, DeviceTimeMS: dt, ArrivalMS: dt + 40, Samples: 25})
			if s < 60 {
				red, ir := fixtureRaw(seq, 25)
				b.Raw = append(b.Raw, RawCapture{Device: raw.ID, Seq: seq, DeviceTimeMS: dt, RateHz: 100, Red: red, IR: ir})
			}
		}
		b.Chunks = append(b.Chunks, Chunk{Device: sum.ID, Seq: uint64(s + 1), DeviceTimeMS: t, ArrivalMS: t + 70})
		f := float64(s)
		b.Points = append(b.Points,
			Point{Device: raw.ID, TimeMS: t + 1000, SpO2: 97 - f/100, Pulse: 72.25 + float64(s%7)/4, PI: 1.875, SQI: 0.875, Ratio: 0.5 + f/1000, Source: 1},
			Point{Device: sum.ID, TimeMS: t + 1000, SpO2: float64(90 + s%9), Pulse: 60, PI: math.NaN(), SQI: 1, Ratio: math.NaN(), Flags: uint16(s % 3), Source: 2})
		if s%10 == 5 {
			b.Points[1].SpO2 = math.NaN()
		}
		b.Cursors = []Cursor{{Device: raw.ID, LastSeq: seq, Chunks: uint64(4 * (s + 1)), Samples: uint64(100 * (s + 1)), Lost: min(seq-uint64(4*(s+1)), 1), LastSeenMS: t + 790, LastDeviceMS: t + 750},
			{Device: sum.ID, LastSeq: uint64(s + 1), Chunks: uint64(s + 1), LastSeenMS: t + 70, LastDeviceMS: t}}
		if s == 120 {
			b.Episodes = []*Episode{{Device: sum.ID, Condition: "spo2_low", Priority: "medium", OnsetMS: t - 20_000, AnnouncedMS: t, MinSpO2: 88, DeficitPctS: 31.5, Active: true, Profile: "adult-ward-pilot"}}
			b.AlarmStates = map[string][]byte{sum.ID: []byte(`{"version":1,"fixture":true}`)}
			b.Audit = []*AuditEntry{{TimeMS: t, Actor: "nurse-1", Action: "alarm.ack", Device: sum.ID, Detail: "fixture"}}
		}
		out = append(out, b)
	}
	return out
}

// writeFixture writes the fixture batches into a new store in dir: the
// first 180 s compacted into the per-device buckets, the rest left in the
// recent log, as a gateway that stopped leaves them.
func writeFixture(t testing.TB, dir string) {
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	for i, b := range fixtureBatches() {
		if err := db.Write(b); err != nil {
			t.Fatal(err)
		}
		if i == 179 {
			if err := db.CompactAll(); err != nil {
				t.Fatal(err)
			}
		}
	}
}

func TestMakeFixture(t *testing.T) {
	if *makeFixture == "" {
		t.Skip("only with -make-fixture DIR")
	}
	writeFixture(t, *makeFixture)
}

// unpackFixture copies a fixture data directory (its store file gzipped:
// bbolt files are mostly empty pages) into a new temporary directory.
func unpackFixture(t testing.TB, src string) string {
	t.Helper()
	dst := t.TempDir()
	id, err := os.ReadFile(filepath.Join(src, IdentityFileName))
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dst, IdentityFileName), id, 0o600); err != nil {
		t.Fatal(err)
	}
	in, err := os.Open(filepath.Join(src, FileName+".gz"))
	if err != nil {
		t.Fatal(err)
	}
	defer in.Close()
	zr, err := gzip.NewReader(in)
	if err != nil {
		t.Fatal(err)
	}
	out, err := os.OpenFile(filepath.Join(dst, FileName), os.O_CREATE|os.O_WRONLY, 0o600)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := io.Copy(out, zr); err != nil {
		t.Fatal(err)
	}
	if err := out.Close(); err != nil {
		t.Fatal(err)
	}
	return dst
}

// sameFloat compares stored values: NaN equals NaN, else within tol.
func sameFloat(a, b, tol float64) bool {
	if math.IsNaN(a) || math.IsNaN(b) {
		return math.IsNaN(a) && math.IsNaN(b)
	}
	return math.Abs(a-b) <= tol
}

// checkFixture reads every kind of the fixture store back and compares it
// with what fixtureBatches wrote.
func checkFixture(t *testing.T, db *DB) {
	t.Helper()
	var wantPts map[string][]Point = map[string][]Point{}
	wantRaw := map[uint64]RawCapture{}
	wantLedger := map[string]LedgerTotal{}
	for _, b := range fixtureBatches() {
		for _, p := range b.Points {
			wantPts[p.Device] = append(wantPts[p.Device], p)
		}
		for _, r := range b.Raw {
			wantRaw[r.Seq] = r
		}
		for _, c := range b.Chunks {
			lt := wantLedger[c.Device]
			lt.Chunks++
			lt.Samples += uint64(c.Samples)
			lt.MaxSeq = max(lt.MaxSeq, c.Seq)
			lt.Distinct = true
			wantLedger[c.Device] = lt
		}
	}
	for dev, want := range wantPts {
		var got []Point
		if err := db.Trend(dev, fixtureStart, fixtureStart+300_000, func(p Point) bool { got = append(got, p); return true }); err != nil {
			t.Fatal(err)
		}
		if len(got) != len(want) {
			t.Fatalf("%s: %d trend points, want %d", dev, len(got), len(want))
		}
		for i := range want {
			g, w := got[i], want[i]
			// Version 1 stored float32: compare to float32 precision.
			if g.TimeMS != w.TimeMS || g.Flags != w.Flags || g.Source != w.Source || !sameFloat(g.SpO2, w.SpO2, 1e-4) ||
				!sameFloat(g.Pulse, w.Pulse, 1e-4) || !sameFloat(g.PI, w.PI, 1e-5) || !sameFloat(g.SQI, w.SQI, 1e-5) || !sameFloat(g.Ratio, w.Ratio, 1e-5) {
				t.Fatalf("%s point %d: got %+v, want %+v", dev, i, g, w)
			}
		}
	}
	n := 0
	err := db.RawCaptures("fx-raw", fixtureStart, fixtureStart+300_000, func(r RawCapture) bool {
		w, ok := wantRaw[r.Seq]
		if !ok || r.DeviceTimeMS != w.DeviceTimeMS || r.RateHz != w.RateHz || !reflect.DeepEqual(r.Red, w.Red) || !reflect.DeepEqual(r.IR, w.IR) || len(r.Ambient) != 0 {
			t.Fatalf("raw capture seq %d: got %+v, want %+v", r.Seq, r, w)
		}
		n++
		return true
	})
	if err != nil || n != len(wantRaw) {
		t.Fatalf("raw captures: %d of %d read, %v", n, len(wantRaw), err)
	}
	tot, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(tot, wantLedger) {
		t.Fatalf("ledger totals %+v, want %+v", tot, wantLedger)
	}
	curs, err := db.Cursors()
	if err != nil || curs["fx-raw"].LastSeq != 801 || curs["fx-sum"].LastDeviceMS != fixtureStart+199_000 {
		t.Fatalf("cursors %+v, %v", curs, err)
	}
	eps, err := db.Episodes(EpisodeFilter{Device: "fx-sum"})
	if err != nil || len(eps) != 1 || eps[0].MinSpO2 != 88 || !eps[0].Active {
		t.Fatalf("episodes %+v, %v", eps, err)
	}
	st, err := db.AlarmStates()
	if err != nil || string(st["fx-sum"]) != `{"version":1,"fixture":true}` {
		t.Fatalf("alarm states %q, %v", st, err)
	}
	aud, err := db.Audit(0, "alarm.", 0)
	if err != nil || len(aud) != 1 || aud[0].Actor != "nurse-1" {
		t.Fatalf("audit %+v, %v", aud, err)
	}
	ses, err := db.SessionsSince("fx-raw", 0)
	if err != nil || len(ses) != 1 || ses[0].Remote != "127.0.0.1:5000" {
		t.Fatalf("sessions %+v, %v", ses, err)
	}
}

// TestFixtureRoundTrip checks checkFixture against a store the current code
// writes, so the fixture check itself is known to pass on fresh data.
func TestFixtureRoundTrip(t *testing.T) {
	dir := t.TempDir()
	writeFixture(t, dir)
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	checkFixture(t, db)
}

// TestOpenStoreOfRelease1 opens the store written by the release before
// the compact encodings (testdata/store-release-1), reads it back, writes
// to it with the current code and reads it again: both formats side by side.
func TestOpenStoreOfRelease1(t *testing.T) {
	dir := unpackFixture(t, filepath.Join("testdata", "store-release-1"))
	rep, err := VerifyDir(dir, VerifyOptions{})
	if err != nil || !rep.OK() {
		t.Fatalf("verify: %+v, %v", rep, err)
	}
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	checkFixture(t, db)
	if err := db.CompactAll(); err != nil {
		t.Fatal(err)
	}
	checkFixture(t, db)
	// The current code writes on: the raw device's next messages go into
	// ledger ranges beside the release's one-per-message records.
	last := fixtureStart + 199_750
	b := &Batch{}
	for s := uint64(802); s <= 811; s++ {
		last += 250
		b.Chunks = append(b.Chunks, Chunk{Device: "fx-raw", Seq: s, DeviceTimeMS: last, ArrivalMS: last + 40, Samples: 25})
	}
	b.Cursors = []Cursor{{Device: "fx-raw", LastSeq: 811, Chunks: 810, Samples: 810 * 25, Lost: 1, LastSeenMS: last + 40, LastDeviceMS: last}}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	tot, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if got := tot["fx-raw"]; got != (LedgerTotal{Chunks: 810, Samples: 810 * 25, MaxSeq: 811, Distinct: true}) {
		t.Errorf("ledger after writing on: %+v", got)
	}
	for seq, want := range map[uint64]bool{1: true, 49: true, 50: false, 801: true, 802: true, 811: true, 812: false} {
		if got, err := db.LedgerHas("fx-raw", seq); err != nil || got != want {
			t.Errorf("LedgerHas(fx-raw, %d) = %v, %v; want %v", seq, got, err, want)
		}
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	rep, err = VerifyDir(dir, VerifyOptions{})
	if err != nil || !rep.OK() {
		t.Fatalf("verify after compaction: %+v, %v", rep, err)
	}
}

// TestStatsCountsWhatWasWritten checks Stats against the fixture's known
// contents: 400 trend points (200 s of two devices), 1,000 ledger messages,
// 240 raw chunks of 25 samples at 100 Hz (60 s).
func TestStatsCountsWhatWasWritten(t *testing.T) {
	for _, dir := range []string{unpackFixture(t, filepath.Join("testdata", "store-release-1")), func() string {
		d := t.TempDir()
		writeFixture(t, d)
		return d
	}()} {
		db, err := Open(dir, Options{ReadOnly: true})
		if err != nil {
			t.Fatal(err)
		}
		st, err := db.Stats()
		db.Close()
		if err != nil {
			t.Fatal(err)
		}
		if st.TrendPoints != 400 || st.Kind("ledger").Items != 1000 || st.Kind("raw").Items != 240 || st.RawSeconds != 60 {
			t.Errorf("%s: trend %d, ledger %d, raw %d chunks / %v s; want 400, 1000, 240 / 60 s",
				dir, st.TrendPoints, st.Kind("ledger").Items, st.Kind("raw").Items, st.RawSeconds)
		}
		if st.Kind("episodes").Records != 1 || st.Kind("audit").Records != 1 || st.DeviceDays != 400.0/86_400 {
			t.Errorf("%s: %+v", dir, st)
		}
		if st.Kind("ledger").Bytes == 0 || st.Kind("trend").Bytes == 0 || st.FileBytes < st.Kind("raw").Bytes {
			t.Errorf("%s: bytes %+v", dir, st)
		}
	}
}
