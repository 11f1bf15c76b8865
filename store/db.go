package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"sync"
	"time"

	bolt "go.etcd.io/bbolt"
	bolterrors "go.etcd.io/bbolt/errors"
)

// FileName is the store file inside a data directory.
const FileName = "pulsefleet.db"

// schemaVersion is written to meta/schema; Open refuses a newer one.
const schemaVersion = 1

// Value format versions (the first byte of every stored value).
const (
	vJSON   = 1
	vPoint  = 1
	vChunk  = 1
	vRaw    = 1
	vCursor = 1
)

// Sentinel errors.
var (
	// ErrLocked: another process holds the store file.
	ErrLocked = errors.New("store is locked by another process (is a gateway running on this data directory?)")
	// ErrNotFound: no such record.
	ErrNotFound = errors.New("not found")
)

var (
	bMeta         = []byte("meta")
	bDevices      = []byte("devices")
	bCursors      = []byte("cursors")
	bTrend        = []byte("trend")
	bLedger       = []byte("ledger")
	bRaw          = []byte("raw")
	bSessions     = []byte("sessions")
	bEpisodes     = []byte("episodes")
	bAlarmState   = []byte("alarmstate")
	bAudit        = []byte("audit")
	bProfiles     = []byte("profiles")
	bCalibrations = []byte("calibrations")
	bCalAssign    = []byte("calassign")
	bTokens       = []byte("tokens")

	allBuckets = [][]byte{bMeta, bDevices, bCursors, bRecent, bTrend, bLedger, bRaw, bSessions, bEpisodes,
		bAlarmState, bAudit, bProfiles, bCalibrations, bCalAssign, bTokens}
)

// Options tunes Open. The zero value is usable.
type Options struct {
	// Timeout waits for another process's file lock; 0 means 1 s.
	Timeout time.Duration
	// ReadOnly opens the file for reading only (shared lock), e.g. for export.
	ReadOnly bool
}

// DB is an open store. Its methods are safe for concurrent use.
type DB struct {
	bolt *bolt.DB
	path string
	idx  indexCache

	writeMu sync.Mutex // serialises Write (bbolt does too) and guards the tail's generations
	tail    trendTail
}

// Open opens (creating when needed) the store in directory dir.
func Open(dir string, opt Options) (*DB, error) {
	if opt.Timeout == 0 {
		opt.Timeout = time.Second
	}
	if !opt.ReadOnly {
		if err := os.MkdirAll(dir, 0o750); err != nil {
			return nil, fmt.Errorf("open store: %w", err)
		}
	}
	path := filepath.Join(dir, FileName)
	if opt.ReadOnly {
		if _, err := os.Stat(path); err != nil {
			return nil, fmt.Errorf("open store %s: %w", path, err)
		}
	}
	// bbolt remaps the file each time it outgrows the mapping, and a remap
	// waits for every open transaction: the store writer stalls, and with it
	// every acknowledgement. Mapping 1 GiB of address space up front (not
	// memory: pages are touched as the file grows) avoids those stalls until
	// then.
	b, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: opt.Timeout, ReadOnly: opt.ReadOnly,
		FreelistType: bolt.FreelistMapType, InitialMmapSize: 1 << 30})
	if err != nil {
		if errors.Is(err, bolterrors.ErrTimeout) {
			return nil, fmt.Errorf("open store %s: %w", path, ErrLocked)
		}
		return nil, fmt.Errorf("open store %s: %w", path, err)
	}
	db := &DB{bolt: b, path: path, idx: indexCache{m: map[string]uint32{}}}
	if opt.ReadOnly {
		if err := db.checkSchema(); err != nil {
			b.Close()
			return nil, err
		}
		if err := b.View(db.loadTail); err != nil {
			b.Close()
			return nil, fmt.Errorf("open store %s: recent trend log: %w", path, err)
		}
		return db, nil
	}
	err = b.Update(func(tx *bolt.Tx) error {
		for _, name := range allBuckets {
			if _, err := tx.CreateBucketIfNotExists(name); err != nil {
				return err
			}
		}
		m := tx.Bucket(bMeta)
		if v := m.Get([]byte("schema")); v != nil {
			if got := binary.BigEndian.Uint32(v); got > schemaVersion {
				return fmt.Errorf("schema version %d is newer than this binary's %d", got, schemaVersion)
			}
			return nil
		}
		return m.Put([]byte("schema"), u32(schemaVersion))
	})
	if err == nil {
		err = b.View(db.loadTail)
	}
	if err != nil {
		b.Close()
		return nil, fmt.Errorf("open store %s: %w", path, err)
	}
	return db, nil
}

func (db *DB) checkSchema() error {
	return db.bolt.View(func(tx *bolt.Tx) error {
		m := tx.Bucket(bMeta)
		if m == nil {
			return fmt.Errorf("open store %s: not a pulsefleet store (no meta bucket)", db.path)
		}
		if v := m.Get([]byte("schema")); v == nil || binary.BigEndian.Uint32(v) > schemaVersion {
			return fmt.Errorf("open store %s: unsupported schema", db.path)
		}
		return nil
	})
}

// Path is the store file's path.
func (db *DB) Path() string { return db.path }

// Close closes the file.
func (db *DB) Close() error { return db.bolt.Close() }

// Check runs bbolt's consistency check over the whole file and returns the
// first problem found (used by tests and `pulsefleet` maintenance).
func (db *DB) Check() error {
	return db.bolt.View(func(tx *bolt.Tx) error {
		for err := range tx.Check() {
			return err
		}
		return nil
	})
}

// Size is the store file's size in bytes.
func (db *DB) Size() int64 {
	var n int64
	_ = db.bolt.View(func(tx *bolt.Tx) error { n = tx.Size(); return nil })
	return n
}

func u32(v uint32) []byte { b := make([]byte, 4); binary.BigEndian.PutUint32(b, v); return b }
func u64(v uint64) []byte { b := make([]byte, 8); binary.BigEndian.PutUint64(b, v); return b }

// dayOf returns the UTC day number of a Unix-millisecond time.
func dayOf(ms int64) uint32 {
	if ms < 0 {
		return 0
	}
	return uint32(ms / 86_400_000)
}

func clone(b []byte) []byte { return append([]byte(nil), b...) }
