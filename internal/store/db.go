package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	bolt "go.etcd.io/bbolt"
	bolterrors "go.etcd.io/bbolt/errors"
)

// FileName is the store file inside a data directory.
const FileName = "pulsefleet.db"

// schemaVersion is written to meta/schema; Open refuses a newer one.
const schemaVersion = 1

// Value format versions: the first byte of every value this package encodes
// (doc.go names the three values stored as given, without one).
const (
	vJSON   = 1
	vPoint  = 1
	vChunk  = 1 // one record per message; ledger ranges are vLedgerRange (ledger.go)
	vRaw    = 1 // one record per chunk; raw blocks are vRawBlock (rawblock.go)
	vCursor = 1 // version 1 carries LastDeviceMS when 8 bytes longer (older cursors lack it)
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
	// bLabels holds operator labels by device (admin.go); made by the first
	// label set, so a store that never had one opens with older binaries.
	bLabels     = []byte("devlabels")
	bTokens     = []byte("tokens")
	bEnrolments = []byte("enrolments")
	// bOutbox and bOutboxFired are in outbox.go.
	bReviews = []byte("reviews")

	keySchema  = []byte("schema")
	keyStoreID = []byte("store_id")

	allBuckets = [][]byte{bMeta, bDevices, bCursors, bRecent, bTrend, bLedger, bRaw, bSessions, bEpisodes,
		bAlarmState, bAudit, bProfiles, bCalibrations, bCalAssign, bTokens, bEnrolments, bOutbox, bReviews}
)

// Options tunes Open. The zero value is usable.
type Options struct {
	// Timeout waits for another process's file lock; 0 means 1 s.
	Timeout time.Duration
	// ReadOnly opens the file for reading only (shared lock), e.g. for export.
	ReadOnly bool
	// NewStore starts an empty store on purpose where the identity file
	// says one was created but the store file is missing or empty (after a
	// loss that no backup can undo). It refuses when a non-empty store file
	// is there: move that aside first.
	NewStore bool
}

// DB is an open store. Its methods are safe for concurrent use.
type DB struct {
	bolt *bolt.DB
	path string
	idx  indexCache
	id   string // meta/store_id

	writeMu sync.Mutex // serialises Write (bbolt does too) and guards the tail's generations
	tail    trendTail
	newest  map[string]int64 // per device, at least the newest trend time stored (keepfirst.go); guarded by writeMu
	// ledgerOpen is each device's ledger range the next message may
	// extend (ledger.go); guarded by writeMu.
	ledgerOpen map[uint32]*openRange
	// rawOpen is each device's raw block the next chunk may extend
	// (rawblock.go); guarded by writeMu.
	rawOpen map[string]*rawState

	fault atomic.Pointer[WriteFault] // tests: fails writes (fault.go)

	outboxKick atomic.Pointer[func()] // set by EnableOutbox: Write queues notifications (outbox.go)

	commits atomic.Uint64 // Write transactions committed (Commits)
}

// Open opens (creating when needed) the store in directory dir.
//
// It refuses, with an error naming the file and what to do, a store that is
// damaged (ErrDamaged: corrupt pages, truncated, empty, failing the quick
// check below), a store file that vanished or became empty where the
// identity file says one was created (ErrStoreMissing), and a store that is
// not the one created in the directory (ErrIdentityMismatch). A directory
// without an identity file (made before it existed) gets one.
//
// The quick check runs on every Open and reads a few pages only: the file
// is as long as its meta page says, the meta bucket and schema version are
// there, and the first and last records of every bucket (and of the first
// and last nested bucket) decode. Verify is the full check.
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
	ident, err := readIdentity(dir)
	if err != nil {
		return nil, err
	}
	st, serr := os.Stat(path)
	if serr != nil && !errors.Is(serr, os.ErrNotExist) {
		return nil, fmt.Errorf("open store %s: %w", path, serr)
	}
	exists := serr == nil
	empty := exists && st.Size() == 0
	switch {
	case opt.ReadOnly && !exists:
		return nil, fmt.Errorf("open store %s: %w", path, serr)
	case opt.NewStore && opt.ReadOnly:
		return nil, fmt.Errorf("open store %s: a new store cannot be made read-only", path)
	case opt.NewStore && exists && !empty:
		return nil, fmt.Errorf("open store %s: a new store was asked for (--new-store), but the file holds %d bytes: "+
			"leave out --new-store to use it, or move it aside first", path, st.Size())
	case opt.NewStore:
		if empty {
			if err := os.Remove(path); err != nil {
				return nil, fmt.Errorf("open store %s: %w", path, err)
			}
		}
		ident = nil // a new identity is written below
	case ident != nil && (!exists || empty):
		what := "is missing"
		if empty {
			what = "is empty (0 bytes)"
		}
		return nil, fmt.Errorf("open store %s: %w: the file %s, but %s says store %s was created here at %s; "+
			"restore the store from a backup, or start an empty store on purpose with `pulsefleet serve --new-store`",
			path, ErrStoreMissing, what, filepath.Join(dir, IdentityFileName), ident.StoreID, ident.Created)
	case empty:
		return nil, damaged(path, "the file is empty (0 bytes), as a store never is")
	}
	if exists {
		if p := checkMetaPages(path); len(p) > 0 {
			return nil, damaged(path, "%s", strings.Join(p, "; "))
		}
	}
	db := &DB{path: path, idx: indexCache{m: map[string]uint32{}}, newest: map[string]int64{}, ledgerOpen: map[uint32]*openRange{}, rawOpen: map[string]*rawState{}}
	err = guard(path, func() error { return db.open(opt, ident) })
	if err != nil {
		if db.bolt != nil {
			db.bolt.Close()
		}
		return nil, err
	}
	if !opt.ReadOnly && ident == nil {
		if err := writeIdentity(dir, db.id, time.Now()); err != nil {
			db.bolt.Close()
			return nil, err
		}
	}
	return db, nil
}

// open does Open's work on the file inside guard.
func (db *DB) open(opt Options, ident *Identity) error {
	path := db.path
	// bbolt remaps the file each time it outgrows the mapping, and a remap
	// waits for every open transaction: the store writer stalls, and with it
	// every acknowledgement. Mapping 1 GiB of address space up front (not
	// memory: pages are touched as the file grows) avoids those stalls until
	// then.
	b, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: opt.Timeout, ReadOnly: opt.ReadOnly,
		FreelistType: bolt.FreelistMapType, InitialMmapSize: 1 << 30})
	if err != nil {
		if errors.Is(err, bolterrors.ErrTimeout) {
			return fmt.Errorf("open store %s: %w", path, ErrLocked)
		}
		if derr := boltOpenError(path, err); derr != nil {
			return derr
		}
		return fmt.Errorf("open store %s: %w", path, err)
	}
	db.bolt = b
	if err := b.View(func(tx *bolt.Tx) error { return quickCheck(tx, path) }); err != nil {
		return err
	}
	if !opt.ReadOnly {
		err = b.Update(func(tx *bolt.Tx) error {
			for _, name := range allBuckets {
				if _, err := tx.CreateBucketIfNotExists(name); err != nil {
					return err
				}
			}
			m := tx.Bucket(bMeta)
			if m.Get(keySchema) == nil {
				if err := m.Put(keySchema, u32(schemaVersion)); err != nil {
					return err
				}
			}
			if m.Get(keyStoreID) == nil && ident == nil {
				// A new store, or one made before store ids: name it.
				// (With an identity file and no id, the check below refuses.)
				return m.Put(keyStoreID, []byte(newStoreID()))
			}
			return nil
		})
		if err != nil {
			return fmt.Errorf("open store %s: %w", path, err)
		}
	}
	err = b.View(func(tx *bolt.Tx) error {
		if m := tx.Bucket(bMeta); m != nil {
			db.id = string(m.Get(keyStoreID))
		}
		if ident != nil && db.id != ident.StoreID && !(opt.ReadOnly && db.id == "") {
			got := db.id
			if got == "" {
				got = "none"
			}
			return fmt.Errorf("open store %s: %w: the file has store id %s, but %s says store %s was created here at %s; "+
				"this is another store (restored from elsewhere?): put the right file back, or delete %s to adopt this one",
				path, ErrIdentityMismatch, got, IdentityFileName, ident.StoreID, ident.Created, IdentityFileName)
		}
		if err := db.loadTail(tx); err != nil {
			return damaged(path, "recent trend log: %v", err)
		}
		return nil
	})
	return err
}

// ID is the store's id (meta/store_id; the identity file holds the same).
func (db *DB) ID() string { return db.id }

// Path is the store file's path.
func (db *DB) Path() string { return db.path }

// Close closes the file.
func (db *DB) Close() error { return db.bolt.Close() }

// Check runs bbolt's consistency check over the whole file and returns the
// first problem found (used by tests; Verify is the full check).
func (db *DB) Check() error {
	return db.view(func(tx *bolt.Tx) error {
		var first error
		for err := range tx.Check() { // drain: Check's goroutine sends every problem
			if first == nil {
				first = err
			}
		}
		return first
	})
}

// Size is the store file's size in bytes.
func (db *DB) Size() int64 {
	var n int64
	_ = db.view(func(tx *bolt.Tx) error { n = tx.Size(); return nil })
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
