package store

import (
	"encoding/binary"
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// Hand-over between the gateways of a fleet (internal/cluster): a gateway
// killed after committing a device's messages but before its
// acknowledgement reached the device holds messages that the device then
// resent to the gateway that took it over. When the killed gateway comes
// back, it asks the others which of its newest messages they hold and
// drops its own earlier copy of those (DropMessages), so each message is
// in exactly one store. These methods are the store's side of that.

// HeldRange is a run of a device's sequence numbers one ledger record holds,
// with the gateway arrival times of its first and last message.
type HeldRange struct {
	First      uint64 `json:"first"`
	Last       uint64 `json:"last"`
	FirstArrMS int64  `json:"first_arrival_ms"`
	LastArrMS  int64  `json:"last_arrival_ms"`
}

// LedgerNewest returns each device's ledger record with the highest first
// sequence number: the one the device's last stream extended (messages
// committed just before a kill are in it).
func (db *DB) LedgerNewest() (map[string]HeldRange, error) {
	byIdx := map[uint32]HeldRange{}
	names, err := db.scanLedger(func(r *ledgerRange) {
		if h, ok := byIdx[r.idx]; !ok || r.first > h.First {
			byIdx[r.idx] = HeldRange{r.first, r.last, r.firstArr, r.lastAr}
		}
	})
	if err != nil {
		return nil, err
	}
	out := make(map[string]HeldRange, len(byIdx))
	for idx, h := range byIdx {
		out[names[idx]] = h
	}
	return out, nil
}

// LedgerHeld returns the ledger records of device that hold any of the
// sequence numbers lo..hi, clipped to lo..hi (arrival times stay those of
// the whole record). A device the store does not know holds nothing.
func (db *DB) LedgerHeld(device string, lo, hi uint64) ([]HeldRange, error) {
	var out []HeldRange
	err := db.view(func(tx *bolt.Tx) error {
		idx, ok := db.lookupIndex(tx, device, map[string]uint32{})
		if !ok {
			return nil
		}
		return forDeviceRanges(tx, idx, func(k []byte, r *ledgerRange) error {
			if r.last < lo || r.first > hi {
				return nil
			}
			out = append(out, HeldRange{max(r.first, lo), min(r.last, hi), r.firstArr, r.lastAr})
			return nil
		})
	})
	if err != nil {
		return nil, fmt.Errorf("store: ledger of %q: %w", device, err)
	}
	return out, nil
}

// forDeviceRanges calls fn with every ledger record of device index idx in
// every day bucket.
func forDeviceRanges(tx *bolt.Tx, idx uint32, fn func(k []byte, r *ledgerRange) error) error {
	root := tx.Bucket(bLedger)
	return root.ForEachBucket(func(dk []byte) error {
		var ferr error
		err := forDeviceRanges1(root.Bucket(dk), idx, func(k []byte, r *ledgerRange) {
			if ferr == nil {
				ferr = fn(k, r)
			}
		})
		if err != nil {
			return err
		}
		return ferr
	})
}

// DropMessages removes device's sequence numbers lo..hi from the ingest
// ledger: another gateway of the fleet holds them (the device resent them
// there because this gateway's acknowledgement never reached it). A record
// cut in two keeps its outer times; the times at the cut and the split of
// its sample count are interpolated by sequence number (a record does not
// keep per-message figures). It returns how many messages it dropped.
// The trend points and raw captures those messages produced stay (they are
// derived per time, not per message; merged trend queries take one point
// per time).
func (db *DB) DropMessages(device string, lo, hi uint64) (uint64, error) {
	if lo > hi {
		return 0, nil
	}
	db.writeMu.Lock()
	defer db.writeMu.Unlock()
	var dropped uint64
	err := db.update(func(tx *bolt.Tx) error {
		idx, ok := db.lookupIndex(tx, device, map[string]uint32{})
		if !ok {
			return nil
		}
		type cut struct {
			day uint32
			key []byte
			r   ledgerRange
		}
		var cuts []cut
		root := tx.Bucket(bLedger)
		err := root.ForEachBucket(func(dk []byte) error {
			day := binary.BigEndian.Uint32(dk)
			var ks [][]byte
			var rs []ledgerRange
			err := forDeviceRanges1(root.Bucket(dk), idx, func(k []byte, r *ledgerRange) {
				if r.last >= lo && r.first <= hi {
					ks, rs = append(ks, k), append(rs, *r)
				}
			})
			for i := range ks {
				cuts = append(cuts, cut{day, ks[i], rs[i]})
			}
			return err
		})
		if err != nil {
			return err
		}
		for _, c := range cuts {
			b := root.Bucket(u32(c.day))
			if err := b.Delete(c.key); err != nil {
				return err
			}
			r := c.r
			dropped += min(r.last, hi) - max(r.first, lo) + 1
			if r.first < lo { // the part before lo keeps its key
				left := part(r, r.first, lo-1)
				if err := b.Put(c.key, encodeLedgerRange(&left)); err != nil {
					return err
				}
			}
			if r.last > hi { // the part after hi starts at hi+1
				right := part(r, hi+1, r.last)
				key := make([]byte, ledgerRangeKeySize)
				binary.BigEndian.PutUint32(key, idx)
				binary.BigEndian.PutUint64(key[4:], hi+1)
				for n := uint16(0); b.Get(key) != nil; n++ {
					if n == ^uint16(0) {
						return fmt.Errorf("ledger: device index %d: too many ranges starting at sequence %d", idx, hi+1)
					}
					binary.BigEndian.PutUint16(key[12:], n+1)
				}
				if err := b.Put(key, encodeLedgerRange(&right)); err != nil {
					return err
				}
			}
		}
		// The device's open range is read again from the ledger by its
		// next message.
		delete(db.ledgerOpen, idx)
		return nil
	})
	if err != nil {
		return 0, fmt.Errorf("store: dropping messages %d..%d of %q: %w", lo, hi, device, err)
	}
	return dropped, nil
}

// forDeviceRanges1 calls fn with the device's records of one day bucket
// (version 2 ranges; version 1 records, from before fleets, are skipped).
func forDeviceRanges1(b *bolt.Bucket, idx uint32, fn func(k []byte, r *ledgerRange)) error {
	c := b.Cursor()
	var seek [4]byte
	binary.BigEndian.PutUint32(seek[:], idx)
	for k, v := c.Seek(seek[:]); k != nil; k, v = c.Next() {
		if len(k) != ledgerRangeKeySize {
			continue
		}
		if binary.BigEndian.Uint32(k) != idx {
			return nil
		}
		var r ledgerRange
		if err := decodeLedger(k, v, &r); err != nil {
			return err
		}
		fn(clone(k), &r)
	}
	return nil
}

// part is the piece first..last of range r, its cut times and sample count
// interpolated by sequence number.
func part(r ledgerRange, first, last uint64) ledgerRange {
	n := float64(r.count())
	at := func(a, b int64, seq uint64) int64 {
		if n <= 1 {
			return a
		}
		return a + int64(float64(b-a)*float64(seq-r.first)/(n-1))
	}
	p := ledgerRange{idx: r.idx, first: first, last: last,
		samples:  uint64(float64(r.samples) * float64(last-first+1) / n),
		firstDev: at(r.firstDev, r.lastDv, first), lastDv: at(r.firstDev, r.lastDv, last),
		firstArr: at(r.firstArr, r.lastAr, first), lastAr: at(r.firstArr, r.lastAr, last)}
	return p
}
