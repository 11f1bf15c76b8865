package store

import (
	"encoding/binary"
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// LedgerSeqs returns every sequence number in the ingest ledger, per
// device id, in no particular order (a sequence stored twice appears
// twice). Like LedgerTotals it is for verification: the failover tests
// check across the stores of several gateways that each acknowledged
// message is held exactly once.
func (db *DB) LedgerSeqs() (map[string][]uint64, error) {
	names := map[uint32]string{}
	out := map[string][]uint64{}
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
				if len(k) != ledgerKeySize {
					return fmt.Errorf("bad ledger record")
				}
				idx := binary.BigEndian.Uint32(k[8:])
				out[names[idx]] = append(out[names[idx]], binary.BigEndian.Uint64(k[12:]))
				return nil
			})
		})
	})
	if err != nil {
		return nil, fmt.Errorf("store: ledger: %w", err)
	}
	return out, nil
}
