package uplink

import (
	"os"
	"path/filepath"
	"testing"
)

// Whatever bytes a spool file holds (a crash, a bad disk, another program),
// opening it never panics: it recovers a prefix of whole records and cuts
// the rest, and a second open finds nothing more to cut.
func FuzzSpoolOpen(f *testing.F) {
	dir := f.TempDir()
	sp, _, err := openSpool(dir, []byte(`{"device":"d"}`))
	if err != nil {
		f.Fatal(err)
	}
	for i := 1; i <= 3; i++ {
		it := &item{seq: uint64(i), samples: 2, mark: []byte("m")}
		if err := sp.addData(it, []byte{8, byte(i)}); err != nil {
			f.Fatal(err)
		}
	}
	sp.finished(1)
	sp.renumbered(2, 10)
	sp.close()
	good, err := os.ReadFile(filepath.Join(dir, spoolName))
	if err != nil {
		f.Fatal(err)
	}
	f.Add(good)
	f.Add(good[:len(good)-3])
	f.Add([]byte{0, 0, 0, 1, 0, 0, 0, 0, 'Z'})
	f.Fuzz(func(t *testing.T, b []byte) {
		d := t.TempDir()
		if err := os.WriteFile(filepath.Join(d, spoolName), b, 0o644); err != nil {
			t.Fatal(err)
		}
		sp, rec, err := openSpool(d, []byte(`{}`))
		if err != nil {
			return
		}
		for _, it := range rec.items {
			if it.seq <= rec.finished {
				t.Fatalf("held message %d at or below finished %d", it.seq, rec.finished)
			}
			if _, err := sp.read(it); err != nil {
				t.Fatalf("held message %d unreadable: %v", it.seq, err)
			}
		}
		sp.close()
		sp2, rec2, err := openSpool(d, []byte(`{}`))
		if err != nil {
			t.Fatal(err)
		}
		defer sp2.close()
		if rec2.cut != 0 || len(rec2.items) != len(rec.items) {
			t.Fatalf("second open: cut %d, %d items; first had %d items", rec2.cut, len(rec2.items), len(rec.items))
		}
	})
}
