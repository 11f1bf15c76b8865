package store

import (
	"errors"
	"fmt"
	"strings"
	"syscall"
	"time"

	bolt "go.etcd.io/bbolt"
)

// WriteFault, when set with InjectWriteFault, runs inside every Write's
// transaction after all of the batch's records are applied; a non-nil
// error rolls the transaction back exactly as a failed commit does (a full
// disk fails in bbolt's commit, after the records were applied in memory).
// It exists for tests that fail writes intermittently without root.
type WriteFault func(b *Batch) error

// InjectWriteFault sets (nil clears) the fault Write runs before committing.
func (db *DB) InjectWriteFault(f WriteFault) {
	if f == nil {
		db.fault.Store(nil)
		return
	}
	db.fault.Store(&f)
}

// ErrInjected is what tests' write faults usually return.
var ErrInjected = errors.New("injected write failure")

// IsFull reports whether err is a store write that failed for lack of
// space (ENOSPC, a quota, the file size limit). bbolt reports some of them
// as text only (its file-grow error), so the message is checked too.
func IsFull(err error) bool {
	if err == nil {
		return false
	}
	for _, e := range []syscall.Errno{syscall.ENOSPC, syscall.EDQUOT, syscall.EFBIG} {
		if errors.Is(err, e) || strings.Contains(err.Error(), e.Error()) {
			return true
		}
	}
	return false
}

var probeKey = []byte("probe")

// Probe makes one small durable write (the time, in meta/probe) and reports
// whether it committed: the gateway uses it to learn that writes succeed
// again after a failure even when no device is writing.
func (db *DB) Probe(now time.Time) error {
	db.writeMu.Lock()
	defer db.writeMu.Unlock()
	err := db.bolt.Update(func(tx *bolt.Tx) error {
		if err := tx.Bucket(bMeta).Put(probeKey, u64(uint64(now.UnixMilli()))); err != nil {
			return err
		}
		if f := db.fault.Load(); f != nil {
			return (*f)(&Batch{})
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("store: probe write: %w", err)
	}
	return nil
}
