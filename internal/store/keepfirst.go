package store

import (
	"math"
	"sort"

	bolt "go.etcd.io/bbolt"
)

// Keep the first: stored history is never rewritten. A trend point at a
// device time the store already holds for that device (in the per-device
// buckets, in the recent log, or earlier in the same batch) is not written;
// Write counts it in Batch.KeptOut. The gateway refuses such resends before
// they reach the store (a data message's device time must be after the last
// accepted one, store.Cursor.LastDeviceMS), and tells the device; this is the
// store's own guarantee beneath it.
//
// Cost: a point later than the newest committed time of its device (the
// common case: devices send in time order) costs one map lookup. Only a
// point at or before it is looked up in the tail and the day bucket. The
// newest time of a device is read from the store once per Open (the last key
// of its last day bucket, or its newest tail point). Measured with
// BenchmarkKeepFirstInOrder (README, Performance).

// keepFirst returns pts without the points whose (device, time) is already
// stored or earlier in pts, and how many it dropped. It raises db.newest as
// it goes: an upper bound of each device's newest time is all the fast path
// needs (a point after it is new), so a transaction that then fails leaves
// it merely high, which costs lookups, never a wrong answer. Caller holds
// writeMu.
func (db *DB) keepFirst(tx *bolt.Tx, pts []Point) ([]Point, int) {
	var inBatch map[pointKey]struct{} // built on the first point not after its device's newest
	k, dropped := 0, 0
	for i := range pts {
		p := pts[i]
		nw, ok := db.newest[p.Device]
		if !ok {
			nw = db.newestStored(tx, p.Device)
		}
		if p.TimeMS <= nw {
			if inBatch == nil {
				inBatch = make(map[pointKey]struct{}, k)
				for j := 0; j < k; j++ {
					inBatch[pointKey{pts[j].Device, pts[j].TimeMS}] = struct{}{}
				}
			}
			if _, dup := inBatch[pointKey{p.Device, p.TimeMS}]; dup || db.pointStored(tx, p.Device, p.TimeMS) {
				dropped++
				continue
			}
		}
		if p.TimeMS > nw || !ok {
			db.newest[p.Device] = max(nw, p.TimeMS)
		}
		if inBatch != nil {
			inBatch[pointKey{p.Device, p.TimeMS}] = struct{}{}
		}
		pts[k] = p
		k++
	}
	clear(pts[k:])
	return pts[:k], dropped
}

type pointKey struct {
	dev string
	t   int64
}

// newestStored is the newest trend time stored for a device (MinInt64 when none).
func (db *DB) newestStored(tx *bolt.Tx, device string) int64 {
	nw := int64(math.MinInt64)
	if t, ok := db.tail.newest(device); ok {
		nw = t
	}
	if dev := tx.Bucket(bTrend).Bucket([]byte(device)); dev != nil {
		c := dev.Cursor()
		for dk, v := c.Last(); dk != nil; dk, v = c.Prev() {
			if v != nil {
				continue // not a day bucket
			}
			if day := dev.Bucket(dk); day != nil {
				if k, v := day.Cursor().Last(); len(k) == 8 {
					if _, last, _, err := recordSpan(k, v); err == nil {
						nw = max(nw, last)
					} else {
						nw = max(nw, keyTime(k))
					}
					break
				}
			}
		}
	}
	return nw
}

// pointStored reports whether a point of device at t is stored.
func (db *DB) pointStored(tx *bolt.Tx, device string, t int64) bool {
	if db.tail.has(device, t) {
		return true
	}
	dev := tx.Bucket(bTrend).Bucket([]byte(device))
	if dev == nil {
		return false
	}
	day := dev.Bucket(u32(dayOf(t)))
	if day == nil {
		return false
	}
	var key [8]byte
	putKey(key[:], t)
	c := day.Cursor()
	k, _ := c.Seek(key[:])
	if len(k) == 8 && keyTime(k) == t {
		return true
	}
	var v []byte
	if k == nil {
		k, v = c.Last()
	} else {
		k, v = c.Prev()
	}
	if k == nil || !isBlock(v) {
		return false
	}
	if _, last, _, err := blockSpan(k, v); err != nil || last < t {
		return err != nil // a block that does not decode: do not write beside it
	}
	pts, err := decodeBlock(k, v, nil)
	if err != nil {
		return true
	}
	i := sort.Search(len(pts), func(i int) bool { return pts[i].TimeMS >= t })
	return i < len(pts) && pts[i].TimeMS == t
}

func keyTime(k []byte) int64 {
	var t int64
	for _, b := range k[:8] {
		t = t<<8 | int64(b)
	}
	return t
}

// newest returns a device's newest tail point time.
func (t *trendTail) newest(device string) (int64, bool) {
	t.mu.RLock()
	defer t.mu.RUnlock()
	s := t.byDev[device]
	if len(s) == 0 {
		return 0, false
	}
	return s[len(s)-1].t, true
}

// has reports whether the tail holds a point of device at time ms.
func (t *trendTail) has(device string, ms int64) bool {
	t.mu.RLock()
	defer t.mu.RUnlock()
	s := t.byDev[device]
	i := sort.Search(len(s), func(i int) bool { return s[i].t >= ms })
	return i < len(s) && s[i].t == ms
}
