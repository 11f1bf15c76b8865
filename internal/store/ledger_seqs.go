package store

import (
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// LedgerRanges returns the ingest ledger's sequence ranges per device id
// ([first, last], inclusive, in no particular order; a sequence stored
// twice is in two ranges). Like LedgerTotals it is for verification: the
// failover tests check across the stores of several gateways that each
// acknowledged message is held exactly once.
func (db *DB) LedgerRanges() (map[string][][2]uint64, error) {
	byIdx := map[uint32][][2]uint64{}
	names, err := db.scanLedger(func(r *ledgerRange) {
		byIdx[r.idx] = append(byIdx[r.idx], [2]uint64{r.first, r.last})
	})
	if err != nil {
		return nil, err
	}
	out := make(map[string][][2]uint64, len(byIdx))
	for idx, rs := range byIdx {
		out[names[idx]] = rs
	}
	return out, nil
}

// scanLedger calls fn with every record of the ingest ledger in one read
// transaction and returns the device ids by index (verification only).
func (db *DB) scanLedger(fn func(r *ledgerRange)) (map[uint32]string, error) {
	names := map[uint32]string{}
	err := db.view(func(tx *bolt.Tx) error {
		if err := tx.Bucket(bDevices).ForEach(func(k, v []byte) error {
			var d Device
			if err := decJSON(v, &d); err != nil {
				return err
			}
			names[d.Index] = d.ID
			return nil
		}); err != nil {
			return err
		}
		return tx.Bucket(bLedger).ForEachBucket(func(dk []byte) error {
			return tx.Bucket(bLedger).Bucket(dk).ForEach(func(k, v []byte) error {
				var r ledgerRange
				if err := decodeLedger(k, v, &r); err != nil {
					return err
				}
				fn(&r)
				return nil
			})
		})
	})
	if err != nil {
		return nil, fmt.Errorf("store: ledger: %w", err)
	}
	return names, nil
}
