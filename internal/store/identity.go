package store

import (
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"time"
)

// IdentityFileName is the small file beside the store that says a store was
// created in this directory, and which one. A store file that vanished or
// became empty would otherwise be recreated silently, empty, and with no
// credential in it the gateway would run open; with the identity file
// present Open refuses instead.
const IdentityFileName = "pulsefleet.id"

// Identity is the content of the identity file; the store keeps the same id
// in meta/store_id.
type Identity struct {
	StoreID   string `json:"store_id"`   // 32 hex digits, random
	CreatedMS int64  `json:"created_ms"` // when the identity was written (Unix ms)
	Created   string `json:"created"`    // the same, RFC 3339, for people
	File      string `json:"file"`       // the store file's name in the directory
}

// ErrStoreMissing: the identity file says a store was created in the
// directory, but the store file is gone or empty.
var ErrStoreMissing = errors.New("store file missing")

// ErrIdentityMismatch: the store file is not the one created in the directory.
var ErrIdentityMismatch = errors.New("store identity mismatch")

func newStoreID() string {
	var b [16]byte
	_, _ = rand.Read(b[:]) // crypto/rand.Read never fails (Go 1.24+)
	return hex.EncodeToString(b[:])
}

// readIdentity reads dir's identity file; (nil, nil) when there is none.
func readIdentity(dir string) (*Identity, error) {
	p := filepath.Join(dir, IdentityFileName)
	b, err := os.ReadFile(p)
	if errors.Is(err, os.ErrNotExist) {
		return nil, nil
	}
	if err != nil {
		return nil, fmt.Errorf("store identity %s: %w", p, err)
	}
	var id Identity
	if err := json.Unmarshal(b, &id); err != nil || len(id.StoreID) != 32 {
		return nil, fmt.Errorf("store identity %s is unreadable (%d bytes): restore it from a backup with the store, "+
			"or delete it to adopt the store file that is there", p, len(b))
	}
	return &id, nil
}

// writeIdentity writes dir's identity file atomically (temporary file,
// fsync, rename), mode 0600.
func writeIdentity(dir, storeID string, now time.Time) error {
	id := Identity{StoreID: storeID, CreatedMS: now.UnixMilli(), Created: now.UTC().Format(time.RFC3339), File: FileName}
	b, err := json.MarshalIndent(id, "", "  ")
	if err != nil {
		return err
	}
	p := filepath.Join(dir, IdentityFileName)
	tmp := p + ".tmp"
	f, err := os.OpenFile(tmp, os.O_WRONLY|os.O_CREATE|os.O_TRUNC, 0o600)
	if err != nil {
		return fmt.Errorf("store identity %s: %w", p, err)
	}
	_, err = f.Write(append(b, '\n'))
	if err == nil {
		err = f.Sync()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(tmp, p)
	}
	if err != nil {
		os.Remove(tmp)
		return fmt.Errorf("store identity %s: %w", p, err)
	}
	if d, err := os.Open(dir); err == nil {
		_ = d.Sync()
		d.Close()
	}
	return nil
}

// ReadIdentity returns the identity file of data directory dir, or nil when
// it has none.
func ReadIdentity(dir string) (*Identity, error) { return readIdentity(dir) }
