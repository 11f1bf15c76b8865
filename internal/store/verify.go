package store

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"time"

	bolt "go.etcd.io/bbolt"
	bolterrors "go.etcd.io/bbolt/errors"
)

// The store's own record checks, shared by the quick check of every Open
// (first and last records only) and by Verify (every record, plus bbolt's
// consistency check and cross-checks between buckets).

// checker walks the buckets; in quick mode it stops at the first problem.
type checker struct {
	path     string
	full     bool
	max      int
	problems []string
	records  map[string]int64

	// Cross-checks (full mode).
	devByIdx  map[uint32]string
	devices   map[string]bool
	cursors   map[string]Cursor
	ledgerMax map[uint32]uint64
	ledgerN   map[uint32]uint64

	unit     func() // called after each unit of work (progress)
	units    int
	stopping bool
}

func (c *checker) problem(format string, args ...any) {
	if len(c.problems) < c.max {
		c.problems = append(c.problems, fmt.Sprintf(format, args...))
	}
	if !c.full || len(c.problems) >= c.max {
		c.stopping = true
	}
}

// bucketSpec says what a top-level bucket holds: depth nested levels of
// buckets (with a check of their keys), then records.
type bucketSpec struct {
	nestedKey []func(k []byte) error // per nested level
	record    func(c *checker, parents [][]byte, k, v []byte) error
}

func keyLen(n int) func(k []byte) error {
	return func(k []byte) error {
		if len(k) != n {
			return fmt.Errorf("key of %d bytes, want %d", len(k), n)
		}
		return nil
	}
}

func anyKey(k []byte) error {
	if len(k) == 0 {
		return errors.New("empty key")
	}
	return nil
}

func jsonRecord[T any](check func(c *checker, k []byte, t *T) error) func(c *checker, _ [][]byte, k, v []byte) error {
	return func(c *checker, _ [][]byte, k, v []byte) error {
		var t T
		if err := decJSON(v, &t); err != nil {
			return fmt.Errorf("value does not decode: %v", err)
		}
		if check != nil {
			return check(c, k, &t)
		}
		return nil
	}
}

func idKey(k []byte, id uint64) error {
	if len(k) != 8 || binary.BigEndian.Uint64(k) != id {
		return fmt.Errorf("record id %d does not match its key %x", id, k)
	}
	return nil
}

func pointRecord(dayLevel int) func(c *checker, parents [][]byte, k, v []byte) error {
	return func(c *checker, parents [][]byte, k, v []byte) error {
		var p Point
		kk := k
		if dayLevel < 0 { // recent log: time | device index
			if len(k) != recentKeySize {
				return fmt.Errorf("key of %d bytes, want %d", len(k), recentKeySize)
			}
			kk = k[:8]
		}
		if dayLevel >= 0 && isBlock(v) {
			pts, err := decodeBlock(k, v, nil)
			if err != nil {
				return err
			}
			d := binary.BigEndian.Uint32(parents[dayLevel])
			if dayOf(pts[0].TimeMS) != d || dayOf(pts[len(pts)-1].TimeMS) != d {
				return fmt.Errorf("block of %d..%d ms filed under day %d", pts[0].TimeMS, pts[len(pts)-1].TimeMS, d)
			}
			return nil
		}
		if err := decodePoint(kk, v, &p); err != nil {
			return err
		}
		if dayLevel >= 0 && dayOf(p.TimeMS) != binary.BigEndian.Uint32(parents[dayLevel]) {
			return fmt.Errorf("point at %d ms filed under day %d", p.TimeMS, binary.BigEndian.Uint32(parents[dayLevel]))
		}
		return nil
	}
}

var specs = map[string]bucketSpec{
	"meta": {record: func(c *checker, _ [][]byte, k, v []byte) error {
		switch string(k) {
		case string(keySchema):
			if len(v) != 4 {
				return fmt.Errorf("schema: %d bytes, want 4", len(v))
			}
			if got := binary.BigEndian.Uint32(v); got == 0 || got > schemaVersion {
				return fmt.Errorf("schema version %d, this binary reads 1..%d", got, schemaVersion)
			}
		case string(keyStoreID):
			if len(v) != 32 {
				return fmt.Errorf("store id of %d bytes, want 32", len(v))
			}
		}
		return nil
	}},
	"devices": {record: jsonRecord(func(c *checker, k []byte, d *Device) error {
		if d.ID != string(k) || d.Index == 0 {
			return fmt.Errorf("device record %q under key %q with index %d", d.ID, k, d.Index)
		}
		if c.devByIdx != nil {
			if other, dup := c.devByIdx[d.Index]; dup {
				return fmt.Errorf("devices %q and %q share index %d", other, d.ID, d.Index)
			}
			c.devByIdx[d.Index], c.devices[d.ID] = d.ID, true
		}
		return nil
	})},
	"cursors": {record: func(c *checker, _ [][]byte, k, v []byte) error {
		var cur Cursor
		if err := decodeCursor(v, &cur); err != nil {
			return err
		}
		if c.cursors != nil {
			c.cursors[string(k)] = cur
		}
		return nil
	}},
	"recent": {nestedKey: []func([]byte) error{keyLen(4)}, record: pointRecord(-1)},
	"trend":  {nestedKey: []func([]byte) error{anyKey, keyLen(4)}, record: pointRecord(1)},
	"ledger": {nestedKey: []func([]byte) error{keyLen(4)}, record: func(c *checker, parents [][]byte, k, v []byte) error {
		var r ledgerRange
		if err := decodeLedger(k, v, &r); err != nil {
			return err
		}
		if dayOf(r.firstArr) != binary.BigEndian.Uint32(parents[0]) {
			return fmt.Errorf("ledger record of %d ms filed under day %d", r.firstArr, binary.BigEndian.Uint32(parents[0]))
		}
		if r.lastAr < r.firstArr || r.lastDv < r.firstDev {
			return fmt.Errorf("ledger range %d..%d ends before it starts", r.first, r.last)
		}
		if c.ledgerMax != nil {
			c.ledgerMax[r.idx] = max(c.ledgerMax[r.idx], r.last)
			c.ledgerN[r.idx] += r.count()
		}
		return nil
	}},
	"raw": {nestedKey: []func([]byte) error{anyKey, keyLen(4)}, record: func(_ *checker, _ [][]byte, k, v []byte) error {
		if len(k) != 8 {
			return fmt.Errorf("key of %d bytes, want 8", len(k))
		}
		_, err := decodeRawRecord(k, v, func(RawCapture) bool { return true })
		return err
	}},
	"sessions": {nestedKey: []func([]byte) error{anyKey}, record: jsonRecord[Session](nil)},
	"episodes": {record: jsonRecord(func(_ *checker, k []byte, e *Episode) error { return idKey(k, e.ID) })},
	"alarmstate": {record: func(_ *checker, _ [][]byte, _, v []byte) error {
		if len(v) == 0 {
			return errors.New("empty alarm state")
		}
		return nil
	}},
	"audit": {record: jsonRecord(func(_ *checker, k []byte, e *AuditEntry) error { return idKey(k, e.ID) })},
	"profiles": {record: func(_ *checker, _ [][]byte, _, v []byte) error {
		if len(v) == 0 || v[0] != vJSON {
			return fmt.Errorf("unknown record version %d", firstByte(v))
		}
		return nil
	}},
	"calibrations": {nestedKey: []func([]byte) error{anyKey}, record: jsonRecord(func(_ *checker, k []byte, cal *Calibration) error {
		if len(k) != 4 || binary.BigEndian.Uint32(k) != cal.Version {
			return fmt.Errorf("calibration version %d under key %x", cal.Version, k)
		}
		return nil
	})},
	"devlabels": {record: jsonRecord(func(_ *checker, k []byte, m *map[string]string) error {
		if len(k) == 0 || len(*m) == 0 {
			return fmt.Errorf("labels of device %q: empty key or no labels", k)
		}
		return nil
	})},
	"calassign": {record: func(_ *checker, _ [][]byte, _, v []byte) error {
		if len(v) == 0 {
			return errors.New("empty assignment")
		}
		return nil
	}},
	"enrolments": {record: jsonRecord(func(_ *checker, k []byte, e *Enrolment) error {
		if err := idKey(k, e.ID); err != nil {
			return err
		}
		return checkEnrolment(e)
	})},
	"outbox": {record: jsonRecord(func(_ *checker, k []byte, e *OutboxEntry) error {
		if e.Gen == 0 {
			return fmt.Errorf("outbox entry of episode %d has generation 0", e.Episode)
		}
		return idKey(k, e.Episode)
	})},
	"outbox_fired": {record: func(_ *checker, _ [][]byte, k, v []byte) error {
		var fired map[string]int64
		if err := decJSON(v, &fired); err != nil {
			return fmt.Errorf("firing times do not decode: %v", err)
		}
		return keyLen(8)(k)
	}},
	"reviews": {record: reviewRecord},
	"tokens": {record: jsonRecord(func(_ *checker, k []byte, t *Token) error {
		if t.Hash != string(k) {
			return fmt.Errorf("credential %s under another key", t.ID)
		}
		return nil
	})},
}

// walkBucket checks b (at nesting depth under top); quick mode visits the
// first and last entries only.
func (c *checker) walkBucket(top string, spec bucketSpec, b *bolt.Bucket, parents [][]byte) {
	depth := len(parents)
	where := func(k []byte) string {
		s := top
		for _, p := range parents {
			s += "/" + printable(p)
		}
		if k != nil {
			s += "/" + printable(k)
		}
		return s
	}
	visit := func(k, v []byte) {
		if depth < len(spec.nestedKey) {
			if v != nil {
				c.problem("%s: a record where a bucket belongs", where(k))
				return
			}
			if err := spec.nestedKey[depth](k); err != nil {
				c.problem("%s: %v", where(k), err)
				return
			}
			nb := b.Bucket(k)
			if nb == nil {
				c.problem("%s: nested bucket cannot be opened", where(k))
				return
			}
			c.walkBucket(top, spec, nb, append(parents[:depth:depth], k))
			if depth == 0 {
				c.step()
			}
			return
		}
		if v == nil {
			c.problem("%s: a bucket where records belong", where(k))
			return
		}
		c.records[top]++
		if err := spec.record(c, parents, k, v); err != nil {
			c.problem("%s: %v", where(k), err)
		}
	}
	cur := b.Cursor()
	if !c.full {
		k, v := cur.First()
		if k == nil {
			return
		}
		first := clone(k)
		visit(k, v)
		if c.stopping {
			return
		}
		if k, v = cur.Last(); k != nil && !bytes.Equal(k, first) {
			if bytes.Compare(first, k) > 0 {
				c.problem("%s: keys out of order", where(nil))
				return
			}
			visit(k, v)
		}
		return
	}
	var prev []byte
	for k, v := cur.First(); k != nil && !c.stopping; k, v = cur.Next() {
		if prev != nil && bytes.Compare(prev, k) >= 0 {
			c.problem("%s: keys out of order (%s after %s)", where(nil), printable(k), printable(prev))
		}
		prev = append(prev[:0], k...)
		visit(k, v)
	}
}

func (c *checker) step() {
	if c.unit != nil {
		c.unit()
	}
}

// walk checks every top-level bucket of tx.
func (c *checker) walk(tx *bolt.Tx) {
	var names []string
	_ = tx.ForEach(func(name []byte, _ *bolt.Bucket) error {
		names = append(names, string(name))
		return nil
	})
	if len(names) == 0 {
		return // a new, empty file
	}
	if tx.Bucket(bMeta) == nil {
		c.problem("meta: bucket missing: not a pulsefleet store, or its root page is damaged")
		return
	}
	if tx.Bucket(bMeta).Get(keySchema) == nil {
		c.problem("meta: schema version missing")
		return
	}
	for _, name := range names {
		if c.stopping {
			return
		}
		spec, ok := specs[name]
		if !ok {
			c.problem("%s: a bucket this binary does not know", printable([]byte(name)))
			continue
		}
		c.walkBucket(name, spec, tx.Bucket([]byte(name)), nil)
		if len(spec.nestedKey) == 0 {
			c.step()
		}
	}
}

// crossCheck compares buckets with each other (full mode): cursors and the
// ledger belong to known devices, and no device has ledger records past its
// durable cursor or more than it counted accepted.
func (c *checker) crossCheck() {
	ids := make([]string, 0, len(c.cursors))
	for id := range c.cursors {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		if !c.devices[id] {
			c.problem("cursors/%s: no device record", printable([]byte(id)))
		}
	}
	idxs := make([]uint32, 0, len(c.ledgerN))
	for idx := range c.ledgerN {
		idxs = append(idxs, idx)
	}
	sort.Slice(idxs, func(i, j int) bool { return idxs[i] < idxs[j] })
	for _, idx := range idxs {
		id, ok := c.devByIdx[idx]
		if !ok {
			c.problem("ledger: %d records of device index %d, which no device has", c.ledgerN[idx], idx)
			continue
		}
		cur, ok := c.cursors[id]
		switch {
		case !ok:
			c.problem("ledger: device %s has records but no cursor", printable([]byte(id)))
		case c.ledgerMax[idx] > cur.LastSeq:
			c.problem("ledger: device %s has sequence %d stored, past its durable cursor %d", printable([]byte(id)), c.ledgerMax[idx], cur.LastSeq)
		case c.ledgerN[idx] > cur.Chunks:
			c.problem("ledger: device %s has %d records, more than the %d messages its cursor counts", printable([]byte(id)), c.ledgerN[idx], cur.Chunks)
		}
	}
}

// printable shows a key for a message: as text when it is printable ASCII,
// else in hex.
func printable(k []byte) string {
	for _, b := range k {
		if b < 0x20 || b > 0x7e {
			return fmt.Sprintf("%x", k)
		}
	}
	return string(k)
}

// quickCheck is Open's cheap check; it returns a DamagedError.
func quickCheck(tx *bolt.Tx, path string) error {
	if fi, err := os.Stat(path); err == nil && fi.Size() < tx.Size() {
		return damaged(path, "truncated: the file has %d bytes, its meta page says %d", fi.Size(), tx.Size())
	}
	c := &checker{path: path, max: 1, records: map[string]int64{}}
	c.walk(tx)
	if len(c.problems) > 0 {
		return damaged(path, "%s", c.problems[0])
	}
	return nil
}

// VerifyOptions tunes Verify.
type VerifyOptions struct {
	// Progress, when set, is told the phase ("records", "consistency") and
	// how far it is (done of total units; total 0 = unknown).
	Progress func(phase string, done, total int)
	// MaxProblems stops the check after this many problems; 0 means 100.
	MaxProblems int
	// Timeout waits for another process's lock; 0 means 1 s.
	Timeout time.Duration
}

// VerifyReport is what Verify found.
type VerifyReport struct {
	Path      string           `json:"path"`
	SizeBytes int64            `json:"size_bytes"`
	StoreID   string           `json:"store_id,omitempty"`
	Records   map[string]int64 `json:"records"` // per top-level bucket
	Problems  []string         `json:"problems"`
}

// OK reports whether nothing was found wrong.
func (r *VerifyReport) OK() bool { return len(r.Problems) == 0 }

// VerifyDir checks the store of data directory dir: the identity file
// against the store, then everything VerifyFile checks.
func VerifyDir(dir string, opt VerifyOptions) (*VerifyReport, error) {
	path := filepath.Join(dir, FileName)
	ident, err := readIdentity(dir)
	if err != nil {
		return &VerifyReport{Path: path, Records: map[string]int64{}, Problems: []string{err.Error()}}, nil
	}
	if _, err := os.Stat(path); errors.Is(err, os.ErrNotExist) && ident != nil {
		return &VerifyReport{Path: path, Records: map[string]int64{}, Problems: []string{fmt.Sprintf(
			"the store file is missing, but %s says store %s was created here at %s", IdentityFileName, ident.StoreID, ident.Created)}}, nil
	}
	r, err := VerifyFile(path, opt)
	if err != nil {
		return nil, err
	}
	if ident != nil && r.StoreID != "" && r.StoreID != ident.StoreID {
		r.Problems = append(r.Problems, fmt.Sprintf("the file has store id %s, but %s says %s: another store", r.StoreID, IdentityFileName, ident.StoreID))
	}
	return r, nil
}

// VerifyFile runs the full check of one store file, read-only: bbolt's
// consistency check (tx.Check: page references, freelist, key order) and
// the store's own record checks (version bytes, decodable values, keys of
// the right length and day, ids matching keys, cursors and the ledger
// consistent with the devices). Problems go into the report; the error is
// for a check that could not run (missing file, locked by a gateway).
func VerifyFile(path string, opt VerifyOptions) (*VerifyReport, error) {
	if opt.MaxProblems <= 0 {
		opt.MaxProblems = 100
	}
	if opt.Timeout == 0 {
		opt.Timeout = time.Second
	}
	rep := &VerifyReport{Path: path, Records: map[string]int64{}}
	fi, err := os.Stat(path)
	if err != nil {
		return nil, fmt.Errorf("verify %s: %w", path, err)
	}
	rep.SizeBytes = fi.Size()
	if fi.Size() == 0 {
		rep.Problems = append(rep.Problems, "the file is empty (0 bytes)")
		return rep, nil
	}
	rep.Problems = append(rep.Problems, checkMetaPages(path)...)
	var b *bolt.DB
	err = guard(path, func() error {
		var err error
		b, err = bolt.Open(path, 0o400, &bolt.Options{ReadOnly: true, Timeout: opt.Timeout})
		return err
	})
	if errors.Is(err, bolterrors.ErrTimeout) {
		return nil, fmt.Errorf("verify %s: %w", path, ErrLocked)
	}
	if err != nil {
		var de *DamagedError
		if errors.As(err, &de) {
			rep.Problems = append(rep.Problems, de.Cause)
		} else {
			rep.Problems = append(rep.Problems, fmt.Sprintf("bbolt cannot open it: %v", err))
		}
		return rep, nil
	}
	defer b.Close()
	c := &checker{path: path, full: true, max: opt.MaxProblems, records: rep.Records,
		devByIdx: map[uint32]string{}, devices: map[string]bool{}, cursors: map[string]Cursor{},
		ledgerMax: map[uint32]uint64{}, ledgerN: map[uint32]uint64{}}
	err = guard(path, func() error {
		return b.View(func(tx *bolt.Tx) error {
			c.checkFile(tx, rep, fi.Size(), opt.Progress)
			return nil
		})
	})
	if err != nil {
		var de *DamagedError
		if errors.As(err, &de) {
			c.problem("%s", de.Cause)
		} else {
			c.problem("%v", err)
		}
	}
	rep.Problems = append(rep.Problems, c.problems...)
	return rep, nil
}

// checkFile is VerifyFile's read transaction: it compares the file's size
// with what its meta page says, walks every record, cross-checks them and
// runs bbolt's own check, recording problems in c. It sets rep.StoreID
// first, so a fault later in the walk leaves it set.
func (c *checker) checkFile(tx *bolt.Tx, rep *VerifyReport, size int64, progress func(phase string, done, total int)) {
	if m := tx.Bucket(bMeta); m != nil {
		rep.StoreID = string(m.Get(keyStoreID))
	}
	if size < tx.Size() {
		c.problem("truncated: the file has %d bytes, its meta page says %d", size, tx.Size())
		return // reading on would run past the end of the file
	}
	// Our walk first, in this goroutine where a fault is recovered:
	// bbolt's check runs in a goroutine of its own.
	total := countUnits(tx)
	if progress != nil {
		c.unit = func() { c.units++; progress("records", c.units, total) }
	}
	c.walk(tx)
	c.crossCheck()
	if c.stopping {
		return
	}
	if progress != nil {
		progress("consistency", 0, 0)
	}
	for err := range tx.Check() {
		// bbolt's check recovers its own panics on a damaged page
		// and reports them as "panic: ...": say what it is.
		c.problem("bbolt check: %s", strings.Replace(err.Error(), "panic: ", "stopped at a damaged page: ", 1))
	}
}

// countUnits is the number of units of work the walk reports progress in:
// one per record of a flat bucket, one per nested bucket of the others.
func countUnits(tx *bolt.Tx) int {
	total := 0
	_ = tx.ForEach(func(name []byte, bk *bolt.Bucket) error {
		if s, ok := specs[string(name)]; ok && len(s.nestedKey) > 0 {
			_ = bk.ForEach(func(_, _ []byte) error { total++; return nil })
		} else {
			total++
		}
		return nil
	})
	return total
}
