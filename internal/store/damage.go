package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/fnv"
	"os"
	"path/filepath"
	"runtime/debug"

	bolt "go.etcd.io/bbolt"
	bolterrors "go.etcd.io/bbolt/errors"
)

// ErrDamaged marks a store file that is corrupt, truncated or empty: reading
// it panicked inside bbolt, failed bbolt's checks or the store's own. Match
// it with errors.Is; the error itself is a *DamagedError.
var ErrDamaged = errors.New("store is damaged")

// DamagedError says which store file is damaged, what was found and what to
// do. Its message is one sentence an operator can act on.
type DamagedError struct {
	Path  string // the store file
	Cause string // what was found, e.g. "page 12: invalid page type: 0"
}

func (e *DamagedError) Error() string {
	how := "--file " + e.Path
	if filepath.Base(e.Path) == FileName {
		how = "--data " + filepath.Dir(e.Path)
	}
	return fmt.Sprintf("store %s is damaged (%s): run `pulsefleet verify %s` for a full report, then restore a backup "+
		"(or move the file aside and start afresh with `pulsefleet serve --new-store`)", e.Path, e.Cause, how)
}

// Is makes errors.Is(err, ErrDamaged) true.
func (e *DamagedError) Is(target error) bool { return target == ErrDamaged }

func damaged(path string, format string, args ...any) error {
	return &DamagedError{Path: path, Cause: fmt.Sprintf(format, args...)}
}

// fromPanic turns a value recovered from bbolt into a DamagedError. bbolt
// panics on pages it cannot read (a flipped page type, an overflow past the
// end of the file); with panic-on-fault set, reading past the end of a
// truncated file's mapping panics instead of killing the process.
func fromPanic(path string, r any) error {
	if e, ok := r.(error); ok {
		return damaged(path, "%v", e)
	}
	return damaged(path, "%v", r)
}

// guard runs fn, turning a panic or a memory fault inside it (a corrupt or
// truncated store file) into a DamagedError: the store boundary never lets
// a damaged file crash the process.
func guard(path string, fn func() error) (err error) {
	old := debug.SetPanicOnFault(true)
	defer func() {
		debug.SetPanicOnFault(old)
		if r := recover(); r != nil {
			err = fromPanic(path, r)
		}
	}()
	return fn()
}

// view and update are the only ways the store's methods reach bbolt
// transactions: a damaged page becomes an error naming the file.
func (db *DB) view(fn func(*bolt.Tx) error) error {
	return guard(db.path, func() error { return db.bolt.View(fn) })
}

func (db *DB) update(fn func(*bolt.Tx) error) error {
	return guard(db.path, func() error { return db.bolt.Update(fn) })
}

// boltOpenError maps bbolt's errors about a file it cannot use as a
// database to ErrDamaged.
func boltOpenError(path string, err error) error {
	for _, e := range []error{bolterrors.ErrInvalid, bolterrors.ErrChecksum, bolterrors.ErrVersionMismatch, bolterrors.ErrInvalidMapping} {
		if errors.Is(err, e) {
			return damaged(path, "%v", err)
		}
	}
	return nil
}

// checkMetaPages reads bbolt's two meta pages from the file and reports
// the damaged ones. bbolt opens a file with one damaged meta page silently
// on the other, which may be one transaction older: the newest commit
// (acknowledged data) would be lost without a word, so the store reports it.
// It also checks, before bbolt reads them (a damaged page read while bbolt
// opens the file would panic there and leave the file locked), that the file
// reaches the high-water mark and that the freelist page is one.
//
// The layout is bbolt's (internal/common/meta.go, page.go): a 16-byte page
// header (id uint64, flags uint16, count uint16, overflow uint32), then
// magic, version, page size, flags (uint32 each), the root bucket (two
// uint64), freelist page, high-water mark (pages) and transaction id
// (uint64 each) and an FNV-1a 64 checksum of everything before it.
func checkMetaPages(path string) []string {
	f, err := os.Open(path)
	if err != nil {
		return nil // reported by whoever opens it
	}
	defer f.Close()
	fi, err := f.Stat()
	if err != nil {
		return nil
	}
	const hdr, metaLen, sumAt = 16, 64, 56
	const magic, version = 0xED0CDAED, 2
	const freelistFlag, noFreelist = 0x10, ^uint64(0)
	pageSize := os.Getpagesize()
	first := make([]byte, hdr+metaLen)
	if _, err := f.ReadAt(first, 0); err == nil && binary.LittleEndian.Uint32(first[hdr:]) == magic {
		if ps := int(binary.LittleEndian.Uint32(first[hdr+8:])); ps >= 512 && ps <= 1<<16 {
			pageSize = ps
		}
	}
	var out []string
	var best []byte // the valid meta with the highest transaction id
	for i := 0; i < 2; i++ {
		b := make([]byte, hdr+metaLen)
		if _, err := f.ReadAt(b, int64(i*pageSize)); err != nil {
			out = append(out, fmt.Sprintf("meta page %d cannot be read (file of %d bytes)", i, fi.Size()))
			continue
		}
		m := b[hdr:]
		h := fnv.New64a()
		h.Write(m[:sumAt])
		switch {
		case binary.LittleEndian.Uint32(m) != magic:
			out = append(out, fmt.Sprintf("meta page %d is damaged (bad magic number; bbolt would fall back on the other, which may lack the newest commit)", i))
		case binary.LittleEndian.Uint32(m[4:]) != version:
			out = append(out, fmt.Sprintf("meta page %d has format version %d, want %d", i, binary.LittleEndian.Uint32(m[4:]), version))
		case binary.LittleEndian.Uint64(m[sumAt:]) != h.Sum64():
			out = append(out, fmt.Sprintf("meta page %d is damaged (checksum error; bbolt would fall back on the other, which may lack the newest commit)", i))
		default:
			if best == nil || binary.LittleEndian.Uint64(m[48:]) > binary.LittleEndian.Uint64(best[48:]) {
				best = m
			}
		}
	}
	if best == nil {
		return out
	}
	hwm := int64(binary.LittleEndian.Uint64(best[40:])) * int64(pageSize)
	if fi.Size() < hwm {
		return append(out, fmt.Sprintf("truncated: the file has %d bytes, its meta page says %d", fi.Size(), hwm))
	}
	if fl := binary.LittleEndian.Uint64(best[32:]); fl != noFreelist {
		ph := make([]byte, hdr)
		if _, err := f.ReadAt(ph, int64(fl)*int64(pageSize)); err != nil || binary.LittleEndian.Uint64(ph) != fl ||
			binary.LittleEndian.Uint16(ph[8:]) != freelistFlag {
			out = append(out, fmt.Sprintf("page %d: the freelist page is damaged", fl))
		}
	}
	return out
}
