package store

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"sort"

	bolt "go.etcd.io/bbolt"
)

// The ingest ledger proves exactly-once delivery: every accepted data
// message is in it once. Since format version 2 it holds sequence ranges,
// not one record per message:
//
//	ledger/DAY/DEVIDX|FIRST_SEQ|N   range (version 2): messages FIRST_SEQ..LAST_SEQ of one device, every one accepted
//
// DAY is the arrival day of the range's first message. A device's next
// message extends its open range (the value is rewritten in the same
// transaction as the device's cursor) when its sequence number follows the
// range's last one and it arrives the same day; otherwise it opens a new
// range. N (uint16) numbers ranges that start at the same sequence number
// in one day: that happens only when a message already stored is written
// again, which LedgerTotals then reports (Distinct false), as verify does.
// A range keeps what the per-message records held, summed: message and
// sample counts, first and last device time and arrival time.
//
// Version 1 records (ARRIVAL_MS|DEVIDX|SEQ -> device time, samples: one per
// message) are still read: a day bucket may hold both; each reads as a
// range of one message.

const (
	ledgerRangeKeySize = 4 + 8 + 2
	vLedgerRange       = 2
)

// ledgerRange is one range record.
type ledgerRange struct {
	idx              uint32
	first, last      uint64 // sequence numbers, inclusive
	samples          uint64
	firstDev, lastDv int64 // device times, ms
	firstArr, lastAr int64 // arrival times, ms
}

func (r *ledgerRange) count() uint64 { return r.last - r.first + 1 }

func encodeLedgerRange(r *ledgerRange) []byte {
	b := make([]byte, 0, 1+5*binary.MaxVarintLen64)
	b = append(b, vLedgerRange)
	b = binary.AppendUvarint(b, r.last-r.first)
	b = binary.AppendUvarint(b, r.samples)
	b = binary.AppendVarint(b, r.firstDev)
	b = binary.AppendVarint(b, r.lastDv-r.firstDev)
	b = binary.AppendVarint(b, r.firstArr)
	b = binary.AppendVarint(b, r.lastAr-r.firstArr)
	return b
}

// decodeLedger decodes a ledger record of either version.
func decodeLedger(k, v []byte, r *ledgerRange) error {
	switch {
	case len(k) == ledgerKeySize && len(v) == ledgerValSize && v[0] == vChunk:
		r.firstArr = int64(binary.BigEndian.Uint64(k))
		r.lastAr = r.firstArr
		r.idx = binary.BigEndian.Uint32(k[8:])
		r.first = binary.BigEndian.Uint64(k[12:])
		r.last = r.first
		r.firstDev = int64(binary.BigEndian.Uint64(v[1:]))
		r.lastDv = r.firstDev
		r.samples = uint64(binary.BigEndian.Uint32(v[9:]))
		return nil
	case len(k) == ledgerRangeKeySize && len(v) > 0 && v[0] == vLedgerRange:
		r.idx = binary.BigEndian.Uint32(k)
		r.first = binary.BigEndian.Uint64(k[4:])
		rd := bytes.NewReader(v[1:])
		var f [6]int64
		for i := range f {
			var err error
			if i < 2 {
				var u uint64
				u, err = binary.ReadUvarint(rd)
				f[i] = int64(u)
			} else {
				f[i], err = binary.ReadVarint(rd)
			}
			if err != nil {
				return fmt.Errorf("bad ledger range (%d bytes): %v", len(v), err)
			}
		}
		if rd.Len() != 0 || uint64(f[0]) > ^uint64(0)-r.first || f[3] < 0 || f[5] < 0 {
			return fmt.Errorf("bad ledger range (%d bytes)", len(v))
		}
		r.last = r.first + uint64(f[0])
		r.samples = uint64(f[1])
		r.firstDev, r.lastDv = f[2], f[2]+f[3]
		r.firstArr, r.lastAr = f[4], f[4]+f[5]
		return nil
	}
	return fmt.Errorf("bad ledger record (key %d bytes, value %d bytes, version %d)", len(k), len(v), firstByte(v))
}

// openRange is a device's range that the next message may extend.
type openRange struct {
	day uint32
	key []byte
	r   ledgerRange
}

// ledgerWriter applies one batch's chunks; its opened ranges reach
// db.ledgerOpen only when the transaction commits.
type ledgerWriter struct {
	db      *DB
	tx      *bolt.Tx
	pending map[uint32]*openRange
	// dayB is the day bucket of the last chunk added (a batch's chunks
	// nearly all arrive the same day): looked up once, not per chunk.
	dayB   *bolt.Bucket
	dayKey uint32
}

// add records one accepted message of device idx.
func (w *ledgerWriter) add(c *Chunk, idx uint32) error {
	day := dayOf(c.ArrivalMS)
	o := w.pending[idx]
	if o == nil {
		if prev, ok := w.db.ledgerOpen[idx]; ok {
			cp := *prev
			o = &cp
		} else {
			o = w.lastRangeOf(idx, day)
		}
	}
	if w.dayB == nil || w.dayKey != day {
		b, err := nested(w.tx, bLedger, u32(day))
		if err != nil {
			return err
		}
		w.dayB, w.dayKey = b, day
	}
	b := w.dayB
	if o != nil && o.day == day && o.r.last != ^uint64(0) && c.Seq == o.r.last+1 {
		o.r.last = c.Seq
		o.r.samples += uint64(c.Samples)
		o.r.lastDv, o.r.lastAr = c.DeviceTimeMS, c.ArrivalMS
	} else {
		o = &openRange{day: day, r: ledgerRange{idx: idx, first: c.Seq, last: c.Seq, samples: uint64(c.Samples),
			firstDev: c.DeviceTimeMS, lastDv: c.DeviceTimeMS, firstArr: c.ArrivalMS, lastAr: c.ArrivalMS}}
		key := make([]byte, ledgerRangeKeySize)
		binary.BigEndian.PutUint32(key, idx)
		binary.BigEndian.PutUint64(key[4:], c.Seq)
		// A range starting at this sequence number is there already only
		// when a stored message is written again: keep both, numbered.
		for n := uint16(0); b.Get(key) != nil; n++ {
			if n == ^uint16(0) {
				return fmt.Errorf("ledger: device index %d: too many ranges starting at sequence %d", idx, c.Seq)
			}
			binary.BigEndian.PutUint16(key[12:], n+1)
		}
		o.key = key
	}
	w.pending[idx] = o
	// bbolt keeps references to values until commit: a fresh one each time.
	return b.Put(o.key, encodeLedgerRange(&o.r))
}

// lastRangeOf reads a device's last range of a day bucket (nil when none):
// after Open, the first message of a device may extend it.
func (w *ledgerWriter) lastRangeOf(idx uint32, day uint32) *openRange {
	b := w.tx.Bucket(bLedger).Bucket(u32(day))
	if b == nil {
		return nil
	}
	var seek [ledgerRangeKeySize]byte
	binary.BigEndian.PutUint32(seek[:], idx+1)
	c := b.Cursor()
	var k, v []byte
	if k, _ = c.Seek(seek[:]); k == nil {
		k, v = c.Last()
	} else {
		k, v = c.Prev()
	}
	var r ledgerRange
	if len(k) != ledgerRangeKeySize || binary.BigEndian.Uint32(k) != idx || decodeLedger(k, v, &r) != nil {
		return nil
	}
	return &openRange{day: day, key: clone(k), r: r}
}

// commit keeps the batch's open ranges. Caller holds writeMu.
func (w *ledgerWriter) commit() {
	if w == nil {
		return
	}
	for idx, o := range w.pending {
		w.db.ledgerOpen[idx] = o
	}
}

// LedgerTotals scans the whole ingest ledger and sums it per device. It is
// meant for verification (tests, bench), not for hot paths.
func (db *DB) LedgerTotals() (map[string]LedgerTotal, error) {
	ranges := map[uint32][][2]uint64{}
	byIdx := map[uint32]*LedgerTotal{}
	names, err := db.scanLedger(func(r *ledgerRange) {
		t := byIdx[r.idx]
		if t == nil {
			t = &LedgerTotal{Distinct: true}
			byIdx[r.idx] = t
		}
		t.Chunks += r.count()
		t.Samples += r.samples
		t.MaxSeq = max(t.MaxSeq, r.last)
		rs := ranges[r.idx]
		if n := len(rs); n > 0 && rs[n-1][1] != ^uint64(0) && rs[n-1][1]+1 == r.first {
			rs[n-1][1] = r.last // coalesce one-message records of version 1
		} else {
			rs = append(rs, [2]uint64{r.first, r.last})
		}
		ranges[r.idx] = rs
	})
	if err != nil {
		return nil, err
	}
	out := make(map[string]LedgerTotal, len(byIdx))
	for idx, t := range byIdx {
		rs := ranges[idx]
		sort.Slice(rs, func(i, j int) bool { return rs[i][0] < rs[j][0] })
		for i := 1; i < len(rs); i++ {
			if rs[i][0] <= rs[i-1][1] {
				t.Distinct = false // a sequence number is in two records
			}
		}
		out[names[idx]] = *t
	}
	return out, nil
}

// LedgerHas reports whether the ledger holds device's message seq (within
// the retention of the ledger): a message written again is recognised.
// It looks at the newest day first; version 1 days are scanned.
func (db *DB) LedgerHas(device string, seq uint64) (bool, error) {
	found := false
	err := db.view(func(tx *bolt.Tx) error {
		idx, ok := db.lookupIndex(tx, device, map[string]uint32{})
		if !ok {
			return nil
		}
		root := tx.Bucket(bLedger)
		c := root.Cursor()
		for dk, v := c.Last(); dk != nil && !found; dk, v = c.Prev() {
			if v != nil {
				continue
			}
			b := root.Bucket(dk)
			var seek [ledgerRangeKeySize]byte
			binary.BigEndian.PutUint32(seek[:], idx)
			binary.BigEndian.PutUint64(seek[4:], seq)
			binary.BigEndian.PutUint16(seek[12:], ^uint16(0))
			bc := b.Cursor()
			k, v := bc.Seek(seek[:])
			if k == nil {
				k, v = bc.Last()
			} else if !bytes.Equal(k, seek[:]) {
				k, v = bc.Prev()
			}
			// Back through the device's ranges (release-1 keys, which may
			// sort among them, are checked below).
			for ; k != nil; k, v = bc.Prev() {
				if len(k) != ledgerRangeKeySize {
					continue
				}
				if binary.BigEndian.Uint32(k) != idx {
					break
				}
				var r ledgerRange
				if err := decodeLedger(k, v, &r); err != nil {
					return err
				}
				if r.first <= seq && seq <= r.last {
					found = true
					break
				}
			}
			if found {
				break
			}
			// Version 1 records of this day (20-byte keys).
			err := b.ForEach(func(k, v []byte) error {
				if len(k) == ledgerKeySize && binary.BigEndian.Uint32(k[8:]) == idx && binary.BigEndian.Uint64(k[12:]) == seq {
					found = true
					return errStop
				}
				return nil
			})
			if err != nil && err != errStop {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return false, fmt.Errorf("store: ledger of %q: %w", device, err)
	}
	return found, nil
}
