package store

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"strings"

	bolt "go.etcd.io/bbolt"

	"github.com/pulsefleet/pulsefleet/internal/participants"
)

// Deletion says what DeleteParticipant removed. It holds no data: the
// intervals and how many records of each kind.
type Deletion struct {
	Participant string
	Enrolments  []Enrolment
	TrendPoints uint64
	RawCaptures uint64
	Episodes    uint64
	Reviews     uint64
	AuditID     uint64
}

// DeleteParticipant deletes a withdrawn participant's data: for each of
// pid's enrolments, the enrolled device's trend points and raw captures
// with a device time inside the interval and its episodes whose onset lies
// inside it (with every review of them and their waiting notifications),
// then the enrolments themselves. It writes an audit entry
// (action "participants.delete", by actor at atMS) saying who, when, which
// intervals and how many records, in the same transaction, and returns the
// same figures. It wraps ErrNotFound when pid has no enrolment and
// ErrStillOpen while one is open or while an episode to delete is still
// active (end it or wait: the device may still be
// sending the participant's data).
//
// It holds the write lock throughout: the recent trend log is compacted
// first, so no point of the participant waits there, and no batch writes in
// between. What it cannot reach (backups taken earlier, Prometheus series,
// files exported before) is listed in README "Withdrawal".
func (db *DB) DeleteParticipant(pid string, atMS int64, actor, remote string) (Deletion, error) {
	out := Deletion{Participant: pid}
	db.writeMu.Lock()
	defer db.writeMu.Unlock()
	if err := db.compactAllLocked(); err != nil {
		return out, fmt.Errorf("store: delete participant %s: %w", pid, err)
	}
	err := db.update(func(tx *bolt.Tx) error {
		all, err := readEnrolments(tx)
		if err != nil {
			return err
		}
		for _, e := range all {
			if e.Participant != pid {
				continue
			}
			if e.ToMS == participants.Open {
				return fmt.Errorf("%w: participant: %s's enrolment on %s since %s is open; end it first (participants end)",
					ErrStillOpen, pid, e.Device, fmtMS(e.FromMS))
			}
			out.Enrolments = append(out.Enrolments, e)
		}
		if len(out.Enrolments) == 0 {
			return fmt.Errorf("%w: participant %s has no enrolment", ErrNotFound, pid)
		}
		ivs := make([]string, 0, len(out.Enrolments))
		for _, e := range out.Enrolments {
			n, err := deleteTrend(tx, e.Device, e.FromMS, e.ToMS)
			if err != nil {
				return err
			}
			out.TrendPoints += n
			if n, err = db.deleteRaw(tx, e.Device, e.FromMS, e.ToMS); err != nil {
				return err
			}
			out.RawCaptures += n
			var nr uint64
			if n, nr, err = deleteEpisodes(tx, e.Device, e.FromMS, e.ToMS); err != nil {
				return err
			}
			out.Episodes += n
			out.Reviews += nr
			if err := tx.Bucket(bEnrolments).Delete(u64(e.ID)); err != nil {
				return err
			}
			ivs = append(ivs, e.Device+" "+e.Interval().String())
		}
		a := &AuditEntry{TimeMS: atMS, Actor: actor, Action: "participants.delete", Remote: remote,
			Detail: fmt.Sprintf("participant %s withdrawn: deleted %d trend points, %d raw captures, %d episodes, %d reviews in %s",
				pid, out.TrendPoints, out.RawCaptures, out.Episodes, out.Reviews, strings.Join(ivs, ", "))}
		if err := appendAudit(tx, []*AuditEntry{a}); err != nil {
			return err
		}
		out.AuditID = a.ID
		return nil
	})
	if err != nil {
		return Deletion{Participant: pid}, fmt.Errorf("store: delete participant %s: %w", pid, err)
	}
	return out, nil
}

// deleteTrend deletes device's trend points with fromMS <= time < toMS from
// the day buckets (the recent log was compacted by the caller) and drops day
// buckets left empty. It is the one place that knows the trend layout for
// deletion: a change of that layout changes it here, and
// TestDeleteParticipant reads back through Trend to catch a miss. A block
// (trendblock.go) that holds points on both sides of the interval is
// written again with the points kept, under the time of its first.
func deleteTrend(tx *bolt.Tx, device string, fromMS, toMS int64) (uint64, error) {
	dev := tx.Bucket(bTrend).Bucket([]byte(device))
	if dev == nil {
		return 0, nil
	}
	var n uint64
	var empty [][]byte
	var from [8]byte
	putKey(from[:], fromMS)
	dc := dev.Cursor()
	for dk, _ := dc.Seek(u32(dayOf(fromMS))); dk != nil; dk, _ = dc.Next() {
		if len(dk) != 4 || binary.BigEndian.Uint32(dk) > dayOf(toMS-1) {
			break
		}
		day := dev.Bucket(dk)
		if day == nil {
			continue
		}
		// Records that may hold points of the interval: the one before
		// fromMS (a block reaching into it) and those keyed before toMS.
		var keys [][]byte
		c := day.Cursor()
		var pk, pv []byte
		if k, _ := c.Seek(from[:]); k == nil {
			pk, pv = c.Last()
		} else {
			pk, pv = c.Prev()
		}
		if len(pk) == 8 && isBlock(pv) {
			keys = append(keys, clone(pk))
		}
		for k, _ := c.Seek(from[:]); len(k) == 8 && keyTime(k) < toMS; k, _ = c.Next() {
			keys = append(keys, clone(k))
		}
		for _, k := range keys {
			pts, err := decodeTrendRecord(k, day.Get(k), nil)
			if err != nil {
				return n, err
			}
			kept := pts[:0]
			for _, p := range pts {
				if p.TimeMS >= fromMS && p.TimeMS < toMS {
					n++
				} else {
					kept = append(kept, p)
				}
			}
			if len(kept) == len(pts) {
				continue
			}
			if err := day.Delete(k); err != nil {
				return n, err
			}
			for i, m := 0, 0; i < len(kept); i += m {
				m = blockFit(kept[i:])
				key := make([]byte, 8)
				putKey(key, kept[i].TimeMS)
				if err := day.Put(key, encodeBlock(kept[i:i+m])); err != nil {
					return n, err
				}
			}
		}
		if k, _ := day.Cursor().First(); k == nil {
			empty = append(empty, clone(dk))
		}
	}
	for _, dk := range empty {
		if err := dev.DeleteBucket(dk); err != nil {
			return n, err
		}
	}
	return n, nil
}

// deleteRaw deletes device's raw captures with fromMS <= device time < toMS.
// A block (rawblock.go) holding chunks on both sides of the interval is
// coded again with the chunks kept, under the sequence number of its first.
// The caller holds writeMu; the device's open block is forgotten, so the
// next chunk starts a new one.
func (db *DB) deleteRaw(tx *bolt.Tx, device string, fromMS, toMS int64) (uint64, error) {
	dev := tx.Bucket(bRaw).Bucket([]byte(device))
	if dev == nil {
		return 0, nil
	}
	delete(db.rawOpen, device)
	var n uint64
	var empty [][]byte
	dc := dev.Cursor()
	// A capture is filed under the day of its device time; start a day
	// early in case one was filed under its arrival day.
	start := dayOf(fromMS)
	if start > 0 {
		start--
	}
	for dk, _ := dc.Seek(u32(start)); dk != nil; dk, _ = dc.Next() {
		if len(dk) != 4 || binary.BigEndian.Uint32(dk) > dayOf(toMS-1)+1 {
			break
		}
		day := dev.Bucket(dk)
		if day == nil {
			continue
		}
		type rewrite struct {
			key  []byte
			kept []RawCapture
		}
		var todo []rewrite
		err := day.ForEach(func(k, v []byte) error {
			var all, kept []RawCapture
			if _, err := decodeRawRecord(k, v, func(r RawCapture) bool { all = append(all, r); return true }); err != nil {
				return err
			}
			for _, r := range all {
				if r.DeviceTimeMS < fromMS || r.DeviceTimeMS >= toMS {
					kept = append(kept, r)
				}
			}
			if len(kept) < len(all) {
				n += uint64(len(all) - len(kept))
				todo = append(todo, rewrite{clone(k), kept})
			}
			return nil
		})
		if err != nil {
			return n, err
		}
		for _, w := range todo {
			if err := day.Delete(w.key); err != nil {
				return n, err
			}
			if len(w.kept) > 0 {
				if err := day.Put(u64(w.kept[0].Seq), encodeRawBlock(w.kept)); err != nil {
					return n, err
				}
			}
		}
		if k, _ := day.Cursor().First(); k == nil {
			empty = append(empty, clone(dk))
		}
	}
	for _, dk := range empty {
		if err := dev.DeleteBucket(dk); err != nil {
			return n, err
		}
	}
	return n, nil
}

// deleteEpisodes deletes device's episodes whose onset lies in [fromMS,
// toMS), every review revision of them, and their waiting notifications
// (outbox); it returns how many episodes and reviews went.
func deleteEpisodes(tx *bolt.Tx, device string, fromMS, toMS int64) (uint64, uint64, error) {
	b := tx.Bucket(bEpisodes)
	var del [][]byte
	err := b.ForEach(func(k, v []byte) error {
		var e Episode
		if err := decJSON(v, &e); err != nil {
			return err
		}
		if e.Device == device && e.OnsetMS >= fromMS && e.OnsetMS < toMS {
			if e.Active {
				// The alarm engine still holds it and would write it again
				// when it changes: the deletion would not hold.
				return fmt.Errorf("%w: episode %d of device %s (%s, onset %s, inside the enrolment) is still active; "+
					"delete again once it has ended", ErrStillOpen, e.ID, device, e.Condition, fmtMS(e.OnsetMS))
			}
			del = append(del, clone(k))
		}
		return nil
	})
	if err != nil {
		return 0, 0, err
	}
	var reviews uint64
	rb, ob := tx.Bucket(bReviews), tx.Bucket(bOutbox)
	for _, k := range del {
		if err := b.Delete(k); err != nil {
			return 0, 0, err
		}
		if rb != nil { // reviews/EPISODE_ID|REVISION
			c := rb.Cursor()
			for rk, _ := c.Seek(k); rk != nil && bytes.HasPrefix(rk, k); rk, _ = c.Seek(k) {
				if err := c.Delete(); err != nil {
					return 0, 0, err
				}
				reviews++
			}
		}
		if ob != nil { // outbox/EPISODE_ID
			if err := ob.Delete(k); err != nil {
				return 0, 0, err
			}
		}
		if fb := tx.Bucket(bOutboxFired); fb != nil { // outbox_fired/EPISODE_ID
			if err := fb.Delete(k); err != nil {
				return 0, 0, err
			}
		}
	}
	return uint64(len(del)), reviews, nil
}
