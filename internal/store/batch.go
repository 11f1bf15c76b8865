package store

import (
	"fmt"
	"sync"
	"time"

	bolt "go.etcd.io/bbolt"
)

// Batch is a set of records written in one transaction. Records of one kind
// are applied in order. Fields the store assigns (Device.Index for a new
// device, Episode.ID when 0, AuditEntry.ID) are written back into the batch.
type Batch struct {
	Devices     []*Device
	Cursors     []Cursor
	Points      []Point
	Chunks      []Chunk
	Raw         []RawCapture
	Sessions    []Session
	Episodes    []*Episode
	AlarmStates map[string][]byte // device -> opaque snapshot; nil value deletes
	Audit       []*AuditEntry

	// KeptOut is set by Write: how many of Points it did not write because
	// the store already held a point of that device at that time (earlier
	// in the same batch included). Stored history is never rewritten: the
	// first value at a device time stays (keepfirst.go). Write removes them
	// from Points.
	KeptOut int
}

// Len is the number of records in the batch.
func (b *Batch) Len() int {
	return len(b.Devices) + len(b.Cursors) + len(b.Points) + len(b.Chunks) + len(b.Raw) + len(b.Sessions) +
		len(b.Episodes) + len(b.AlarmStates) + len(b.Audit)
}

// Reset empties the batch, keeping its capacity.
func (b *Batch) Reset() {
	clear(b.Devices)
	b.Devices = b.Devices[:0]
	b.Cursors = b.Cursors[:0]
	b.Points = b.Points[:0]
	b.Chunks = b.Chunks[:0]
	clear(b.Raw)
	b.Raw = b.Raw[:0]
	b.Sessions = b.Sessions[:0]
	clear(b.Episodes)
	b.Episodes = b.Episodes[:0]
	clear(b.AlarmStates)
	clear(b.Audit)
	b.Audit = b.Audit[:0]
	b.KeptOut = 0
}

// indexCache maps device ids to ledger indices; filled lazily.
type indexCache struct {
	mu sync.Mutex
	m  map[string]uint32
}

// Write applies the batch in one transaction. When it returns nil, every
// record is durable. The steps run in a fixed order (devices, cursors, trend
// points, compaction, ledger, raw, sessions, episodes, outbox, alarm states,
// audit); each kind's step is a helper below taking the transaction.
func (db *DB) Write(b *Batch) error {
	if b.Len() == 0 {
		return nil
	}
	db.writeMu.Lock()
	defer db.writeMu.Unlock()
	plan := db.tail.planCompaction(time.Now())
	newIdx := map[string]uint32{}
	var (
		assignedDev []*Device
		assignedEp  []*Episode
		queued      bool // outbox entries were written
		led         *ledgerWriter
		raw         *rawWriter
	)
	err := db.update(func(tx *bolt.Tx) error {
		var err error
		// Devices first, so ledger records can use their index.
		if assignedDev, err = db.putDevices(tx, b.Devices, newIdx); err != nil {
			return err
		}
		if err := putCursors(tx, b.Cursors); err != nil {
			return err
		}
		b.Points, b.KeptOut = db.keepFirst(tx, b.Points)
		if err := writeRecent(tx, db.tail.gen, b.Points, func(id string) (uint32, error) { return db.ensureIndex(tx, id, newIdx) }); err != nil {
			return err
		}
		if plan != nil {
			if err := db.compact(tx, plan); err != nil {
				return fmt.Errorf("compact trend generation %d: %w", plan.sg.gen, err)
			}
		}
		led = &ledgerWriter{db: db, tx: tx, pending: make(map[uint32]*openRange, len(b.Chunks))}
		if err := db.addChunks(tx, led, b.Chunks, newIdx); err != nil {
			return err
		}
		raw = &rawWriter{db: db, tx: tx, pending: map[string]*rawState{}}
		for i := range b.Raw {
			if err := raw.add(&b.Raw[i]); err != nil {
				return err
			}
		}
		if err := putSessions(tx, b.Sessions); err != nil {
			return err
		}
		outbox := db.outboxKick.Load() != nil
		var wasAnnounced map[uint64]bool // episode -> its stored version before this batch was announced
		if assignedEp, wasAnnounced, err = putEpisodes(tx, b.Episodes, outbox); err != nil {
			return err
		}
		if outbox {
			if queued, err = queueOutbox(tx, b.Episodes, wasAnnounced, time.Now().UnixMilli()); err != nil {
				return err
			}
		}
		if err := putAlarmStates(tx, b.AlarmStates); err != nil {
			return err
		}
		if err := appendAudit(tx, b.Audit); err != nil {
			return err
		}
		if f := db.fault.Load(); f != nil {
			return (*f)(b)
		}
		return nil
	})
	if err != nil {
		unassign(assignedDev, assignedEp)
		return fmt.Errorf("store: write batch of %d records: %w", b.Len(), err)
	}
	db.tail.afterCommit(b.Points, plan)
	led.commit()
	raw.commit()
	if queued {
		(*db.outboxKick.Load())()
	}
	db.cacheIndices(newIdx)
	db.commits.Add(1)
	return nil
}

// Commits is the number of batches Write has committed since Open: with
// the records written, it tells how much of the store's cost is per commit
// (bench reports it per second).
func (db *DB) Commits() uint64 { return db.commits.Load() }

// unassign hands back the device indices and episode ids a failed write
// drew: nothing was written, the numbers were rolled back with the
// transaction, so a batch written again must draw them anew.
func unassign(devs []*Device, eps []*Episode) {
	for _, d := range devs {
		d.Index = 0
	}
	for _, e := range eps {
		e.ID = 0
	}
}

// cacheIndices adds the ledger indices of a committed write to the cache.
func (db *DB) cacheIndices(newIdx map[string]uint32) {
	if len(newIdx) == 0 {
		return
	}
	db.idx.mu.Lock()
	for id, i := range newIdx {
		db.idx.m[id] = i
	}
	db.idx.mu.Unlock()
}

// ensureIndex returns a device's ledger index, creating a bare record for a
// device first seen in this batch's trend points. New indices go into
// newIdx, which reaches the cache only after commit (lookupIndex).
func (db *DB) ensureIndex(tx *bolt.Tx, id string, newIdx map[string]uint32) (uint32, error) {
	if idx, ok := newIdx[id]; ok {
		return idx, nil
	}
	if idx, ok := db.lookupIndex(tx, id, newIdx); ok {
		return idx, nil
	}
	devs := tx.Bucket(bDevices)
	seq, err := devs.NextSequence()
	if err != nil {
		return 0, err
	}
	v, err := encJSON(&Device{ID: id, Index: uint32(seq), BatteryPct: -1})
	if err != nil {
		return 0, err
	}
	if err := devs.Put([]byte(id), v); err != nil {
		return 0, err
	}
	newIdx[id] = uint32(seq)
	return uint32(seq), nil
}

// putDevices writes device records, drawing a ledger index for a device
// that has none and is not yet stored. It returns the devices it drew an
// index for (also when it fails part way), so Write can hand those numbers
// back if the transaction rolls back.
func (db *DB) putDevices(tx *bolt.Tx, devices []*Device, newIdx map[string]uint32) ([]*Device, error) {
	var assigned []*Device
	devs := tx.Bucket(bDevices)
	for _, d := range devices {
		if d.ID == "" {
			return assigned, fmt.Errorf("device: empty id")
		}
		if d.Index == 0 {
			if idx, ok := db.lookupIndex(tx, d.ID, newIdx); ok {
				d.Index = idx
			} else {
				seq, err := devs.NextSequence()
				if err != nil {
					return assigned, err
				}
				d.Index = uint32(seq)
				newIdx[d.ID] = d.Index
				assigned = append(assigned, d)
			}
		}
		v, err := encJSON(d)
		if err != nil {
			return assigned, err
		}
		if err := devs.Put([]byte(d.ID), v); err != nil {
			return assigned, err
		}
	}
	return assigned, nil
}

// putCursors writes the devices' durable cursors.
func putCursors(tx *bolt.Tx, cursors []Cursor) error {
	curs := tx.Bucket(bCursors)
	for i := range cursors {
		c := &cursors[i]
		if err := curs.Put([]byte(c.Device), encodeCursor(c)); err != nil {
			return err
		}
	}
	return nil
}

// addChunks hands ledger chunks to the ledger writer; a chunk's device must
// already have a record (written in this batch or before).
func (db *DB) addChunks(tx *bolt.Tx, led *ledgerWriter, chunks []Chunk, newIdx map[string]uint32) error {
	for i := range chunks {
		c := &chunks[i]
		idx, ok := newIdx[c.Device]
		if !ok {
			if idx, ok = db.lookupIndex(tx, c.Device, newIdx); !ok {
				return fmt.Errorf("ledger: device %q has no record", c.Device)
			}
		}
		if err := led.add(c, idx); err != nil {
			return err
		}
	}
	return nil
}

// putSessions writes session records under their device, keyed by start.
func putSessions(tx *bolt.Tx, sessions []Session) error {
	for i := range sessions {
		s := &sessions[i]
		bk, err := nested(tx, bSessions, []byte(s.Device))
		if err != nil {
			return err
		}
		v, err := encJSON(s)
		if err != nil {
			return err
		}
		if err := bk.Put(u64(uint64(s.StartMS)), v); err != nil {
			return err
		}
	}
	return nil
}

// putEpisodes writes episodes, drawing an id for one with none. It returns
// the episodes it drew an id for (also when it fails part way), so Write can
// hand those ids back if the transaction rolls back. When outbox is set it
// also returns, for each episode already stored, whether its stored version
// (before this batch) was announced, for queueOutbox.
func putEpisodes(tx *bolt.Tx, episodes []*Episode, outbox bool) ([]*Episode, map[uint64]bool, error) {
	var assigned []*Episode
	eps := tx.Bucket(bEpisodes)
	var wasAnnounced map[uint64]bool
	if outbox {
		wasAnnounced = map[uint64]bool{}
	}
	for _, e := range episodes {
		if outbox && e.ID != 0 {
			if _, seen := wasAnnounced[e.ID]; !seen {
				wasAnnounced[e.ID] = storedAnnounced(eps, e.ID)
			}
		}
		if e.ID == 0 {
			id, err := eps.NextSequence()
			if err != nil {
				return assigned, nil, err
			}
			e.ID = id
			assigned = append(assigned, e)
		}
		v, err := encJSON(e)
		if err != nil {
			return assigned, nil, err
		}
		if err := eps.Put(u64(e.ID), v); err != nil {
			return assigned, nil, err
		}
	}
	return assigned, wasAnnounced, nil
}

// putAlarmStates writes alarm-state snapshots; a nil snapshot deletes.
func putAlarmStates(tx *bolt.Tx, states map[string][]byte) error {
	as := tx.Bucket(bAlarmState)
	for dev, snap := range states {
		var err error
		if snap == nil {
			err = as.Delete([]byte(dev))
		} else {
			err = as.Put([]byte(dev), snap)
		}
		if err != nil {
			return err
		}
	}
	return nil
}

// lookupIndex returns a device's ledger index from this write's new
// indices, the cache of committed ones, or the devices bucket. What it reads
// from the bucket goes into pending, which reaches the cache only when the
// transaction commits: a device record written earlier in a transaction that
// then fails must not leave its index cached (the index would be handed out
// again and two devices would share ledger records).
func (db *DB) lookupIndex(tx *bolt.Tx, id string, pending map[string]uint32) (uint32, bool) {
	if i, ok := pending[id]; ok {
		return i, true
	}
	db.idx.mu.Lock()
	i, ok := db.idx.m[id]
	db.idx.mu.Unlock()
	if ok {
		return i, true
	}
	v := tx.Bucket(bDevices).Get([]byte(id))
	if v == nil {
		return 0, false
	}
	var d Device
	if decJSON(v, &d) != nil || d.Index == 0 {
		return 0, false
	}
	pending[id] = d.Index
	return d.Index, true
}

// writePoints puts trend points (one device's points ascending in time,
// devices one after another, as compaction hands them over) into the
// per-device day buckets as blocks (trendblock.go).
func writePoints(tx *bolt.Tx, pts []Point) error {
	root := tx.Bucket(bTrend)
	for i := 0; i < len(pts); {
		p := &pts[i]
		if p.Device == "" {
			return fmt.Errorf("trend point: empty device")
		}
		d := dayOf(p.TimeMS)
		j := i + 1
		for j < len(pts) && pts[j].Device == p.Device && dayOf(pts[j].TimeMS) == d && pts[j].TimeMS > pts[j-1].TimeMS {
			j++
		}
		dev, err := root.CreateBucketIfNotExists([]byte(p.Device))
		if err != nil {
			return err
		}
		day, err := dev.CreateBucketIfNotExists(u32(d))
		if err != nil {
			return err
		}
		if err := putDayPoints(day, pts[i:j]); err != nil {
			return fmt.Errorf("trend of %q, day %d: %w", p.Device, d, err)
		}
		i = j
	}
	return nil
}

func putKey(k []byte, ms int64) {
	for i := 7; i >= 0; i-- {
		k[i] = byte(ms)
		ms >>= 8
	}
}

// nested returns (creating) the bucket at path under a root bucket.
func nested(tx *bolt.Tx, root []byte, path ...[]byte) (*bolt.Bucket, error) {
	b := tx.Bucket(root)
	for _, p := range path {
		var err error
		if b, err = b.CreateBucketIfNotExists(p); err != nil {
			return nil, err
		}
	}
	return b, nil
}
