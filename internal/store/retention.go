package store

import (
	"encoding/binary"

	bolt "go.etcd.io/bbolt"
)

// Retention says how long each kind of history is kept; zero keeps forever.
type Retention struct {
	TrendDays  int // trend points, by device time
	LedgerDays int // ingest ledger, by arrival time
	RawDays    int // raw captures, by device time
}

// Prune drops whole day buckets older than the retention at nowMS and
// returns how many were dropped.
func (db *DB) Prune(nowMS int64, r Retention) (int, error) {
	if r.TrendDays > 0 {
		if err := db.CompactAll(); err != nil {
			return 0, err
		}
	}
	today := dayOf(nowMS)
	dropped := 0
	cut := func(days int) (uint32, bool) {
		if days <= 0 || uint32(days) > today {
			return 0, false
		}
		return today - uint32(days), true
	}
	err := db.update(func(tx *bolt.Tx) error {
		dropDays := func(b *bolt.Bucket, before uint32) error {
			var old [][]byte
			_ = b.ForEachBucket(func(k []byte) error {
				if len(k) == 4 && binary.BigEndian.Uint32(k) < before {
					old = append(old, clone(k))
				}
				return nil
			})
			for _, k := range old {
				if err := b.DeleteBucket(k); err != nil {
					return err
				}
				dropped++
			}
			return nil
		}
		perDevice := func(root []byte, days int) error {
			before, ok := cut(days)
			if !ok {
				return nil
			}
			r := tx.Bucket(root)
			return r.ForEachBucket(func(dev []byte) error { return dropDays(r.Bucket(dev), before) })
		}
		if err := perDevice(bTrend, r.TrendDays); err != nil {
			return err
		}
		if err := perDevice(bRaw, r.RawDays); err != nil {
			return err
		}
		if before, ok := cut(r.LedgerDays); ok {
			return dropDays(tx.Bucket(bLedger), before)
		}
		return nil
	})
	return dropped, err
}
