package store

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	bolt "go.etcd.io/bbolt"
)

// seedStore fills a store in dir with every kind of record, over two days,
// enough for the trend, ledger and audit buckets to span many pages.
func seedStore(t testing.TB, dir string) {
	t.Helper()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	start := 20*day - 300_000
	for d := 0; d < 12; d++ {
		dev := &Device{ID: fmt.Sprintf("ward%d-bed%d", d/4, d%4), Mode: "raw", Labels: map[string]string{"ward": "3"}}
		b := &Batch{Devices: []*Device{dev}}
		for i := int64(0); i < 600; i++ {
			ms := start + i*1000
			b.Points = append(b.Points, Point{Device: dev.ID, TimeMS: ms, SpO2: 96, Pulse: 70, PI: 2, SQI: 0.9, Ratio: 0.5, Source: 1})
			b.Chunks = append(b.Chunks, Chunk{Device: dev.ID, Seq: uint64(i + 1), DeviceTimeMS: ms, ArrivalMS: ms + 40, Samples: 25})
		}
		b.Raw = append(b.Raw, RawCapture{Device: dev.ID, Seq: 1, DeviceTimeMS: start, RateHz: 25, Red: make([]uint32, 25), IR: make([]uint32, 25)})
		b.Cursors = append(b.Cursors, Cursor{Device: dev.ID, LastSeq: 600, Chunks: 600, Samples: 600 * 25, LastSeenMS: start + 600_000})
		b.Sessions = append(b.Sessions, Session{Device: dev.ID, StartMS: start, Mode: "raw"})
		b.Episodes = append(b.Episodes, &Episode{Device: dev.ID, Condition: "spo2_low", Priority: "medium", OnsetMS: start + 1000, MinSpO2: 85})
		for i := 0; i < 40; i++ {
			b.Audit = append(b.Audit, &AuditEntry{TimeMS: start + int64(i), Actor: "nurse-a", Action: "alarm.acknowledged", Device: dev.ID, Detail: "note: checked the probe"})
		}
		if err := db.Write(b); err != nil {
			t.Fatal(err)
		}
	}
	if err := db.PutToken(Token{Hash: strings.Repeat("ab", 32), ID: "0123456789ab", Kind: "operator", Subject: "nurse-a", Role: "operator"}, nil); err != nil {
		t.Fatal(err)
	}
	if _, err := db.PutCalibration(Calibration{Name: "proto-a", CurveYAML: "x: 1\n"}, nil); err != nil {
		t.Fatal(err)
	}
	if err := db.CompactAll(); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
}

// copyDir copies a data directory's store and identity file.
func copyDir(t testing.TB, from string) string {
	t.Helper()
	to := t.TempDir()
	for _, n := range []string{FileName, IdentityFileName} {
		b, err := os.ReadFile(filepath.Join(from, n))
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(to, n), b, 0o600); err != nil {
			t.Fatal(err)
		}
	}
	return to
}

// pagesOf returns the ids of the store's leaf and branch pages, its page
// size and its high-water mark (bytes in use).
func pagesOf(t testing.TB, path string) ([]int, int, int64) {
	t.Helper()
	b, err := bolt.Open(path, 0o400, &bolt.Options{ReadOnly: true, PreLoadFreelist: true})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	var ids []int
	var hwm int64
	err = b.View(func(tx *bolt.Tx) error {
		hwm = tx.Size()
		for id := 2; ; id++ {
			pi, err := tx.Page(id)
			if err != nil {
				return err
			}
			if pi == nil {
				return nil
			}
			if pi.Type == "leaf" || pi.Type == "branch" {
				ids = append(ids, id)
			}
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	return ids, b.Info().PageSize, hwm
}

// flipPage inverts every byte of page id, as a failing disk sector or a
// stray write would scramble it.
func flipPage(t testing.TB, path string, id, pageSize int) {
	t.Helper()
	f, err := os.OpenFile(path, os.O_RDWR, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	buf := make([]byte, pageSize)
	if _, err := f.ReadAt(buf, int64(id*pageSize)); err != nil {
		t.Fatal(err)
	}
	for i := range buf {
		buf[i] ^= 0xff
	}
	if _, err := f.WriteAt(buf, int64(id*pageSize)); err != nil {
		t.Fatal(err)
	}
}

// readAll reads every record through the store's methods, as export,
// audit and the gateway's start-up do; it returns the first error.
func readAll(db *DB) error {
	devs, err := db.Devices()
	if err != nil {
		return err
	}
	for _, d := range devs {
		if err := db.Trend(d.ID, 0, 1<<62, func(Point) bool { return true }); err != nil {
			return err
		}
		if err := db.RawCaptures(d.ID, 0, 1<<62, func(RawCapture) bool { return true }); err != nil {
			return err
		}
		if _, err := db.SessionsSince(d.ID, 0); err != nil {
			return err
		}
	}
	for _, f := range []func() error{
		func() error { _, err := db.Audit(0, "", 0); return err },
		func() error { _, err := db.Episodes(EpisodeFilter{}); return err },
		func() error { _, err := db.Tokens(); return err },
		func() error { _, err := db.Cursors(); return err },
		func() error { _, err := db.LedgerTotals(); return err },
		func() error { _, err := db.Calibrations(); return err },
		func() error { _, err := db.AlarmStates(); return err },
		func() error { _, err := db.TrendDevices(); return err },
	} {
		if err := f(); err != nil {
			return err
		}
	}
	return nil
}

func TestVerifyPassesAHealthyStore(t *testing.T) {
	dir := t.TempDir()
	seedStore(t, dir)
	rep, err := VerifyDir(dir, VerifyOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if !rep.OK() {
		t.Fatalf("healthy store reported: %v", rep.Problems)
	}
	// The ledger holds ranges: each device's 600 messages arrive on two
	// days. The trend holds blocks of up to 4,000 bytes: the 300 points of
	// a day (11 bytes each) make one.
	if rep.Records["trend"] != 12*2 || rep.Records["ledger"] != 12*2 || rep.Records["audit"] != 12*40 {
		t.Errorf("records counted %v, want 24 trend blocks, 24 ledger ranges, 480 audit", rep.Records)
	}
}

// Each corruption kind: the store is refused with an error that says the
// file is damaged and what to do, nothing panics, and Verify names a problem.
func TestCorruptStoresAreRefusedNeverPanic(t *testing.T) {
	seed := t.TempDir()
	seedStore(t, seed)
	path := filepath.Join(seed, FileName)
	pages, pageSize, hwm := pagesOf(t, path)
	fi, _ := os.Stat(path)
	t.Logf("store of %d bytes (%d in use), %d leaf/branch pages of %d bytes", fi.Size(), hwm, len(pages), pageSize)

	type corruption struct {
		name  string
		apply func(path string)
	}
	cases := []corruption{
		{"zero-length", func(p string) { os.Truncate(p, 0) }},
		{"zero-length without identity file", func(p string) { os.Truncate(p, 0); os.Remove(filepath.Join(filepath.Dir(p), IdentityFileName)) }},
		{"truncated", func(p string) { os.Truncate(p, hwm/2) }},
		{"meta page 0 flipped", func(p string) { flipPage(t, p, 0, pageSize) }},
		{"meta page 1 flipped", func(p string) { flipPage(t, p, 1, pageSize) }},
		{"both meta pages flipped", func(p string) { flipPage(t, p, 0, pageSize); flipPage(t, p, 1, pageSize) }},
		{"freelist page flipped", func(p string) { flipPage(t, p, freelistPage(t, p), pageSize) }},
	}
	// One flipped data page at a time, spread over the file.
	stride := max(1, len(pages)/25)
	for i := 0; i < len(pages); i += stride {
		id := pages[i]
		cases = append(cases, corruption{fmt.Sprintf("data page %d flipped", id), func(p string) { flipPage(t, p, id, pageSize) }})
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			dir := copyDir(t, seed)
			tc.apply(filepath.Join(dir, FileName))
			var openErr error
			func() {
				defer func() {
					if r := recover(); r != nil {
						t.Fatalf("Open panicked: %v", r)
					}
				}()
				for _, ro := range []bool{true, false} {
					db, err := Open(dir, Options{ReadOnly: ro})
					if err == nil {
						// The quick check did not reach the page: reading
						// it must fail with an error, never a panic.
						err = readAll(db)
						db.Close()
					}
					openErr = err
				}
			}()
			rep, err := VerifyDir(dir, VerifyOptions{})
			if err != nil {
				t.Fatalf("verify could not run: %v", err)
			}
			if rep.OK() {
				t.Errorf("verify found nothing wrong")
			}
			t.Logf("open: %v\nverify: %v", openErr, rep.Problems)
			if openErr == nil {
				t.Fatalf("the damaged store opened and read without an error")
			}
			msg := openErr.Error()
			switch {
			case errors.Is(openErr, ErrStoreMissing): // an empty file where the identity file says a store was made
				if !strings.Contains(msg, filepath.Join(dir, FileName)) || !strings.Contains(msg, "--new-store") {
					t.Errorf("open error does not name the file and the way to start afresh: %s", msg)
				}
			case errors.Is(openErr, ErrDamaged):
				if !strings.Contains(msg, filepath.Join(dir, FileName)) || !strings.Contains(msg, "pulsefleet verify --data "+dir) {
					t.Errorf("open error does not name the file and the verify command: %s", msg)
				}
			default:
				t.Errorf("open error %v is neither ErrDamaged nor ErrStoreMissing", openErr)
			}
		})
	}
}

// freelistPage returns the page id of the store's freelist.
func freelistPage(t testing.TB, path string) int {
	t.Helper()
	b, err := bolt.Open(path, 0o400, &bolt.Options{ReadOnly: true, PreLoadFreelist: true})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	id := -1
	_ = b.View(func(tx *bolt.Tx) error {
		for i := 2; ; i++ {
			pi, err := tx.Page(i)
			if err != nil || pi == nil {
				return err
			}
			if pi.Type == "freelist" {
				id = i
				return nil
			}
		}
	})
	if id < 0 {
		t.Fatal("no freelist page")
	}
	return id
}

// A store file that vanished or became empty where one was created is
// refused (an empty store would hold no credential and run open); starting
// afresh takes --new-store; a directory from before identity files gets one;
// another store put in place is refused.
func TestIdentityFileGuardsAgainstAVanishedStore(t *testing.T) {
	dir := t.TempDir()
	seedStore(t, dir)
	id, err := ReadIdentity(dir)
	if err != nil || id == nil {
		t.Fatalf("no identity file after creating a store: %v", err)
	}
	path := filepath.Join(dir, FileName)

	os.Remove(path)
	if _, err := Open(dir, Options{}); !errors.Is(err, ErrStoreMissing) || !strings.Contains(err.Error(), "--new-store") {
		t.Fatalf("vanished store: %v, want ErrStoreMissing naming --new-store", err)
	}
	if _, err := os.Stat(path); !errors.Is(err, os.ErrNotExist) {
		t.Fatalf("the refused open created a file: %v", err)
	}
	db, err := Open(dir, Options{NewStore: true})
	if err != nil {
		t.Fatalf("--new-store: %v", err)
	}
	newID := db.ID()
	db.Close()
	if id2, _ := ReadIdentity(dir); id2 == nil || id2.StoreID != newID || newID == id.StoreID {
		t.Fatalf("after --new-store the identity is %+v, store id %s (old %s)", id2, newID, id.StoreID)
	}
	if _, err := Open(dir, Options{NewStore: true}); err == nil || !strings.Contains(err.Error(), "move it aside") {
		t.Fatalf("--new-store over a store that is there: %v, want a refusal", err)
	}

	// A directory made before identity files: it keeps working and gets one.
	legacy := t.TempDir()
	seedStore(t, legacy)
	os.Remove(filepath.Join(legacy, IdentityFileName))
	db, err = Open(legacy, Options{})
	if err != nil {
		t.Fatalf("directory without identity file: %v", err)
	}
	lid := db.ID()
	db.Close()
	if got, _ := ReadIdentity(legacy); got == nil || got.StoreID != lid {
		t.Fatalf("identity file not written on first open: %+v", got)
	}

	// Another directory's store moved in: refused, naming both ids.
	b, _ := os.ReadFile(filepath.Join(legacy, FileName))
	os.WriteFile(path, b, 0o600)
	if _, err := Open(dir, Options{}); !errors.Is(err, ErrIdentityMismatch) || !strings.Contains(err.Error(), lid) {
		t.Fatalf("foreign store: %v, want ErrIdentityMismatch naming %s", err, lid)
	}
	if rep, err := VerifyDir(dir, VerifyOptions{}); err != nil || rep.OK() {
		t.Fatalf("verify of a foreign store: %v %v", rep, err)
	}
}

// The quick check runs on every Open; the full check is Verify. Both on the
// same seeded store (12 devices x 600 points, ledger, audit):
//
//	go test ./internal/store -run x -bench 'Open|Verify' -benchtime 20x
func BenchmarkOpenWithQuickCheck(b *testing.B) {
	dir := b.TempDir()
	seedStore(b, dir)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		db, err := Open(dir, Options{ReadOnly: true})
		if err != nil {
			b.Fatal(err)
		}
		db.Close()
	}
}

func BenchmarkVerifyFile(b *testing.B) {
	dir := b.TempDir()
	seedStore(b, dir)
	fi, _ := os.Stat(filepath.Join(dir, FileName))
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		rep, err := VerifyFile(filepath.Join(dir, FileName), VerifyOptions{})
		if err != nil || !rep.OK() {
			b.Fatal(err, rep.Problems)
		}
	}
	b.ReportMetric(float64(fi.Size())/(1<<20), "file_MiB")
}

// Records bbolt's own check cannot judge: the file is a valid B+tree, but
// a value has an unknown version byte, a point sits under the wrong day, a
// ledger record runs past its device's durable cursor. Verify names each;
// bbolt's check alone passes the file.
func TestVerifyFindsRecordProblemsBboltCannotSee(t *testing.T) {
	dir := t.TempDir()
	seedStore(t, dir)
	path := filepath.Join(dir, FileName)
	b, err := bolt.Open(path, 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	err = b.Update(func(tx *bolt.Tx) error {
		if err := tx.Bucket(bAudit).Put(u64(7), []byte{9, '{', '}'}); err != nil { // version 9
			return err
		}
		d20 := tx.Bucket(bTrend).Bucket([]byte("ward1-bed1")).Bucket(u32(20))
		var p [pointSize]byte
		if err := d20.Put(u64(uint64(25*day)), encodePoint(p[:], &Point{SpO2: 90})); err != nil { // a point of day 25 under day 20
			return err
		}
		led, err := tx.Bucket(bLedger).CreateBucketIfNotExists(u32(20))
		if err != nil {
			return err
		}
		k, v := make([]byte, ledgerKeySize), make([]byte, ledgerValSize)
		encodeChunk(k, v, &Chunk{Seq: 9999, ArrivalMS: 20 * day}, 1)
		return led.Put(k, v)
	})
	if err != nil {
		t.Fatal(err)
	}
	var bboltProblems []error
	_ = b.View(func(tx *bolt.Tx) error {
		for err := range tx.Check() {
			bboltProblems = append(bboltProblems, err)
		}
		return nil
	})
	b.Close()
	if len(bboltProblems) > 0 {
		t.Fatalf("bbolt's check already fails the file: %v", bboltProblems)
	}
	rep, err := VerifyFile(path, VerifyOptions{})
	if err != nil {
		t.Fatal(err)
	}
	all := strings.Join(rep.Problems, "\n")
	for _, want := range []string{"audit/0000000000000007: value does not decode: unknown record version 9",
		"trend/ward1-bed1/00000014/", "filed under day 20", "sequence 9999 stored, past its durable cursor 600"} {
		if !strings.Contains(all, want) {
			t.Errorf("verify problems lack %q:\n%s", want, all)
		}
	}
}
