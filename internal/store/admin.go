package store

import (
	"encoding/binary"
	"fmt"
	"sort"
	"strings"

	bolt "go.etcd.io/bbolt"
)

func appendAudit(tx *bolt.Tx, entries []*AuditEntry) error {
	b := tx.Bucket(bAudit)
	for _, e := range entries {
		id, err := b.NextSequence()
		if err != nil {
			return err
		}
		e.ID = id
		v, err := encJSON(e)
		if err != nil {
			return err
		}
		if err := b.Put(u64(id), v); err != nil {
			return err
		}
	}
	return nil
}

// AppendAudit writes audit entries in their own transaction.
func (db *DB) AppendAudit(entries ...*AuditEntry) error {
	return db.update(func(tx *bolt.Tx) error { return appendAudit(tx, entries) })
}

// Audit returns entries at or after fromMS whose action starts with prefix,
// newest first, at most limit (0 = all).
func (db *DB) Audit(fromMS int64, prefix string, limit int) ([]AuditEntry, error) {
	var out []AuditEntry
	err := db.view(func(tx *bolt.Tx) error {
		c := tx.Bucket(bAudit).Cursor()
		for k, v := c.Last(); k != nil; k, v = c.Prev() {
			var e AuditEntry
			if err := decJSON(v, &e); err != nil {
				return err
			}
			if e.TimeMS < fromMS {
				continue
			}
			if strings.HasPrefix(e.Action, prefix) {
				out = append(out, e)
				if limit > 0 && len(out) >= limit {
					return nil
				}
			}
		}
		return nil
	})
	return out, err
}

const defaultProfileKey = "*default*"

func profileKey(device string) []byte {
	if device == "" {
		return []byte(defaultProfileKey)
	}
	return []byte(device)
}

// SetProfile stores a device's alarm profile ("" = the gateway default) with
// an audit entry in the same transaction; nil data removes it.
func (db *DB) SetProfile(device string, data []byte, audit *AuditEntry) error {
	return db.update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bProfiles)
		var err error
		if data == nil {
			err = b.Delete(profileKey(device))
		} else {
			err = b.Put(profileKey(device), append([]byte{vJSON}, data...))
		}
		if err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
}

// Profiles returns every stored profile by device ("" = default).
func (db *DB) Profiles() (map[string][]byte, error) {
	out := map[string][]byte{}
	err := db.view(func(tx *bolt.Tx) error {
		return tx.Bucket(bProfiles).ForEach(func(k, v []byte) error {
			key := string(k)
			if key == defaultProfileKey {
				key = ""
			}
			if len(v) > 0 {
				out[key] = clone(v[1:])
			}
			return nil
		})
	})
	return out, err
}

// Calibration is one stored version of a calibration curve.
type Calibration struct {
	Name      string `json:"name"`
	Version   uint32 `json:"version"`
	CurveYAML string `json:"curve_yaml"`
	CreatedMS int64  `json:"created_ms"`
	CreatedBy string `json:"created_by"`
}

// PutCalibration stores a new version of name and returns it (versions count from 1).
func (db *DB) PutCalibration(c Calibration, audit *AuditEntry) (Calibration, error) {
	err := db.update(func(tx *bolt.Tx) error {
		b, err := nested(tx, bCalibrations, []byte(c.Name))
		if err != nil {
			return err
		}
		c.Version = 1
		if k, _ := b.Cursor().Last(); k != nil {
			c.Version = binary.BigEndian.Uint32(k) + 1
		}
		v, err := encJSON(c)
		if err != nil {
			return err
		}
		if err := b.Put(u32(c.Version), v); err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
	if err != nil {
		return Calibration{}, fmt.Errorf("store: put calibration %q: %w", c.Name, err)
	}
	return c, nil
}

// PutCalibrationVersion stores c at its own version (one a fleet's
// control plane numbered), with an audit entry in the same transaction.
// It reports false, storing nothing, when that version is already held with
// the same curve; it fails, storing nothing, when it is held with another
// curve (a version taken in this store alone before it joined the fleet).
func (db *DB) PutCalibrationVersion(c Calibration, audit *AuditEntry) (bool, error) {
	if c.Version == 0 {
		return false, fmt.Errorf("store: put calibration %q: version 0, want 1 or more", c.Name)
	}
	stored := false
	err := db.update(func(tx *bolt.Tx) error {
		b, err := nested(tx, bCalibrations, []byte(c.Name))
		if err != nil {
			return err
		}
		if v := b.Get(u32(c.Version)); v != nil {
			var have Calibration
			if err := decJSON(v, &have); err != nil {
				return err
			}
			if have.CurveYAML != c.CurveYAML {
				return fmt.Errorf("version %d is already held here with another curve (created %d by %s)", c.Version, have.CreatedMS, have.CreatedBy)
			}
			return nil
		}
		v, err := encJSON(c)
		if err != nil {
			return err
		}
		if err := b.Put(u32(c.Version), v); err != nil {
			return err
		}
		stored = true
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
	if err != nil {
		return false, fmt.Errorf("store: put calibration %s@v%d: %w", c.Name, c.Version, err)
	}
	return stored, nil
}

// Calibrations lists every stored version, by name then version.
func (db *DB) Calibrations() ([]Calibration, error) {
	var out []Calibration
	err := db.view(func(tx *bolt.Tx) error {
		root := tx.Bucket(bCalibrations)
		return root.ForEachBucket(func(name []byte) error {
			return root.Bucket(name).ForEach(func(k, v []byte) error {
				var c Calibration
				if err := decJSON(v, &c); err != nil {
					return err
				}
				out = append(out, c)
				return nil
			})
		})
	})
	return out, err
}

// GetCalibration returns version (0 = latest) of name, or ErrNotFound.
func (db *DB) GetCalibration(name string, version uint32) (Calibration, error) {
	var c Calibration
	err := db.view(func(tx *bolt.Tx) error {
		b := tx.Bucket(bCalibrations).Bucket([]byte(name))
		if b == nil {
			return ErrNotFound
		}
		var v []byte
		if version == 0 {
			_, v = b.Cursor().Last()
		} else {
			v = b.Get(u32(version))
		}
		if v == nil {
			return ErrNotFound
		}
		return decJSON(v, &c)
	})
	if err != nil {
		return c, fmt.Errorf("store: calibration %s@v%d: %w", name, version, err)
	}
	return c, nil
}

// CalibrationCurve returns the curve YAML of version (0 = latest) of name and
// the version found; ErrNotFound when there is none. It fits calibration.Lookup.
func (db *DB) CalibrationCurve(name string, version uint32) (string, uint32, error) {
	c, err := db.GetCalibration(name, version)
	return c.CurveYAML, c.Version, err
}

// AssignCalibration maps target ("model:NAME" or "device:ID") to a
// calibration reference ("name@vN"); an empty ref removes the assignment.
func (db *DB) AssignCalibration(target, ref string, audit *AuditEntry) error {
	return db.update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bCalAssign)
		var err error
		if ref == "" {
			err = b.Delete([]byte(target))
		} else {
			err = b.Put([]byte(target), []byte(ref))
		}
		if err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
}

// CalibrationAssignments returns target -> reference.
func (db *DB) CalibrationAssignments() (map[string]string, error) {
	out := map[string]string{}
	err := db.view(func(tx *bolt.Tx) error {
		return tx.Bucket(bCalAssign).ForEach(func(k, v []byte) error {
			out[string(k)] = string(v)
			return nil
		})
	})
	return out, err
}

// SetDeviceLabels stores the operator's labels of a device (replacing
// earlier ones; empty removes them) with an audit entry in the same
// transaction.
func (db *DB) SetDeviceLabels(device string, labels map[string]string, audit *AuditEntry) error {
	return db.update(func(tx *bolt.Tx) error {
		b, err := tx.CreateBucketIfNotExists(bLabels)
		if err != nil {
			return err
		}
		if len(labels) == 0 {
			err = b.Delete([]byte(device))
		} else {
			var v []byte
			if v, err = encJSON(labels); err == nil {
				err = b.Put([]byte(device), v)
			}
		}
		if err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
}

// DeviceLabels returns the operator's labels of every device that has some.
func (db *DB) DeviceLabels() (map[string]map[string]string, error) {
	out := map[string]map[string]string{}
	err := db.view(func(tx *bolt.Tx) error {
		b := tx.Bucket(bLabels)
		if b == nil {
			return nil // a store made before labels, opened read-only
		}
		return b.ForEach(func(k, v []byte) error {
			m := map[string]string{}
			if err := decJSON(v, &m); err != nil {
				return err
			}
			out[string(k)] = m
			return nil
		})
	})
	return out, err
}

// Token is a stored credential; the secret itself is never stored.
type Token struct {
	Hash      string `json:"hash"`    // hex SHA-256 of the secret
	ID        string `json:"id"`      // public identifier
	Kind      string `json:"kind"`    // "device" | "operator"
	Subject   string `json:"subject"` // device id or operator name
	Role      string `json:"role"`    // viewer | operator | admin (operators)
	CreatedMS int64  `json:"created_ms"`
	RevokedMS int64  `json:"revoked_ms,omitempty"`
	IssuedBy  string `json:"issued_by,omitempty"`
}

// PutToken stores (or replaces) a credential with an audit entry.
func (db *DB) PutToken(t Token, audit *AuditEntry) error {
	return db.update(func(tx *bolt.Tx) error {
		v, err := encJSON(t)
		if err != nil {
			return err
		}
		if err := tx.Bucket(bTokens).Put([]byte(t.Hash), v); err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
}

// Tokens lists every credential, oldest first.
func (db *DB) Tokens() ([]Token, error) {
	var out []Token
	err := db.view(func(tx *bolt.Tx) error {
		return tx.Bucket(bTokens).ForEach(func(k, v []byte) error {
			var t Token
			if err := decJSON(v, &t); err != nil {
				return err
			}
			out = append(out, t)
			return nil
		})
	})
	sort.Slice(out, func(i, j int) bool { return out[i].CreatedMS < out[j].CreatedMS })
	return out, err
}

// TokenByHash returns the credential whose secret hashes to hash (hex
// SHA-256), or ErrNotFound. Revoked credentials are returned too: the caller
// checks RevokedMS.
func (db *DB) TokenByHash(hash string) (Token, error) {
	var t Token
	err := db.view(func(tx *bolt.Tx) error {
		v := tx.Bucket(bTokens).Get([]byte(hash))
		if v == nil {
			return ErrNotFound
		}
		return decJSON(v, &t)
	})
	if err != nil {
		return Token{}, fmt.Errorf("store: token: %w", err)
	}
	return t, nil
}

// RevokeToken marks the credential with public identifier id revoked at
// atMS, with an audit entry in the same transaction, and returns it. It
// returns ErrNotFound for an unknown id; revoking twice keeps the first time.
func (db *DB) RevokeToken(id string, atMS int64, audit *AuditEntry) (Token, error) {
	var out Token
	err := db.update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bTokens)
		var key []byte
		err := b.ForEach(func(k, v []byte) error {
			if key != nil {
				return nil
			}
			var t Token
			if err := decJSON(v, &t); err != nil {
				return err
			}
			if t.ID == id {
				key, out = clone(k), t
			}
			return nil
		})
		if err != nil {
			return err
		}
		if key == nil {
			return ErrNotFound
		}
		if out.RevokedMS == 0 {
			out.RevokedMS = atMS
		}
		v, err := encJSON(out)
		if err != nil {
			return err
		}
		if err := b.Put(key, v); err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
	if err != nil {
		return Token{}, fmt.Errorf("store: revoke token %q: %w", id, err)
	}
	return out, nil
}
