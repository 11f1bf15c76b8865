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
	names := map[uint32]string{}
	byIdx := map[uint32][][2]uint64{}
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
				byIdx[r.idx] = append(byIdx[r.idx], [2]uint64{r.first, r.last})
				return nil
			})
		})
	})
	if err != nil {
		return nil, fmt.Errorf("store: ledger: %w", err)
	}
	out := make(map[string][][2]uint64, len(byIdx))
	for idx, rs := range byIdx {
		out[names[idx]] = rs
	}
	return out, nil
}
