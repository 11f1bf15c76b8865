package store

import (
	"sort"

	bolt "go.etcd.io/bbolt"
)

// KindStats is the space one kind of record (one top-level bucket) takes.
type KindStats struct {
	Kind string `json:"kind"` // the top-level bucket: trend, recent (trend points not yet compacted), ledger, raw, ...
	// Bytes is the size of the pages the kind's records occupy (leaf,
	// branch and overflow pages of the bucket and its nested buckets; a
	// small nested bucket stored inline counts in its parent's pages).
	Bytes int64 `json:"bytes"`
	// InUse is the part of Bytes holding keys, values and page headers.
	InUse int64 `json:"in_use_bytes"`
	// Records is the number of stored entries (not counting nested buckets).
	Records int64 `json:"records"`
	// Items is what the records hold: trend points, ledger messages, raw
	// chunks; for other kinds the number of records.
	Items int64 `json:"items"`
}

// Stats is where a store's bytes go.
type Stats struct {
	Path      string `json:"path"`
	FileBytes int64  `json:"file_bytes"` // the file's high-water mark (bbolt's data size)
	PageSize  int    `json:"page_size"`
	// FreeBytes is the space of free pages (reused by later writes before
	// the file grows), including pages freed by a transaction still open.
	FreeBytes int64       `json:"free_bytes"`
	Kinds     []KindStats `json:"kinds"` // by bucket name
	// TrendPoints counts trend points (compacted and in the recent log);
	// DeviceDays is TrendPoints / 86,400: devices send one point per
	// second, so it is the device-days of history the store holds.
	TrendPoints int64   `json:"trend_points"`
	DeviceDays  float64 `json:"device_days"`
	// RawSeconds is the device-seconds of raw samples captured (samples
	// per channel / sample rate).
	RawSeconds float64 `json:"raw_seconds"`
}

// Kind returns the stats of one kind (zero when the store has none).
func (s *Stats) Kind(name string) KindStats {
	for _, k := range s.Kinds {
		if k.Kind == name {
			return k
		}
	}
	return KindStats{Kind: name}
}

// PerDeviceDay is a kind's bytes per device-day of trend history (0 when
// the store holds no trend).
func (s *Stats) PerDeviceDay(bytes int64) float64 {
	if s.DeviceDays == 0 {
		return 0
	}
	return float64(bytes) / s.DeviceDays
}

// itemCounter counts what one record of a kind holds; nil counts records.
type itemCounter func(k, v []byte) int64

var itemCounters = map[string]itemCounter{
	"trend":  trendItems,
	"recent": func(_, _ []byte) int64 { return 1 },
	"ledger": ledgerItems,
	"raw":    rawItems,
}

// Stats walks every page of the store and sums bytes and records per
// top-level bucket: it takes about as long as reading the file. It is meant
// for the `store stats` command and for gauges refreshed now and then, not
// for every request. It reads in short transactions, one per nested bucket
// (a device's trend, a day of the ledger), so bbolt can reuse the pages
// that writes free meanwhile; figures of a store being written are a sum
// over slightly different moments. A top-level bucket's own pages (those
// listing its nested buckets) are counted only when it holds no nested
// bucket; a nested bucket small enough to sit inline counts its bytes in use.
func (db *DB) Stats() (*Stats, error) {
	st := &Stats{Path: db.path}
	var names []string
	nested := map[string][][]byte{}
	err := db.view(func(tx *bolt.Tx) error {
		st.FileBytes = tx.Size()
		st.PageSize = tx.DB().Info().PageSize
		bs := tx.DB().Stats()
		st.FreeBytes = int64(bs.FreePageN+bs.PendingPageN) * int64(st.PageSize)
		return tx.ForEach(func(name []byte, b *bolt.Bucket) error {
			names = append(names, string(name))
			return b.ForEachBucket(func(k []byte) error {
				nested[string(name)] = append(nested[string(name)], clone(k))
				return nil
			})
		})
	})
	if err != nil {
		return nil, err
	}
	for _, name := range names {
		ks, secs, err := db.kindStats(name, nested[name])
		if err != nil {
			return nil, err
		}
		switch name {
		case "trend", "recent":
			st.TrendPoints += ks.Items
		case "raw":
			st.RawSeconds = secs
		}
		st.Kinds = append(st.Kinds, ks)
	}
	sort.Slice(st.Kinds, func(i, j int) bool { return st.Kinds[i].Kind < st.Kinds[j].Kind })
	st.DeviceDays = float64(st.TrendPoints) / 86_400
	return st, nil
}

// kindStats sums one top-level bucket: its own records in one read
// transaction, then each nested bucket in a transaction of its own.
func (db *DB) kindStats(name string, subs [][]byte) (KindStats, float64, error) {
	ks := KindStats{Kind: name}
	var secs float64
	count := itemCounters[name]
	visit := func(k, v []byte) {
		ks.Records++
		if count != nil {
			ks.Items += count(k, v)
		} else {
			ks.Items++
		}
		if name == "raw" {
			secs += rawSeconds(v)
		}
	}
	pages := func(b *bolt.Bucket) {
		bst := b.Stats()
		ks.Bytes += int64(bst.BranchAlloc + bst.LeafAlloc)
		ks.InUse += int64(bst.BranchInuse + bst.LeafInuse + bst.InlineBucketInuse)
		if bst.BranchAlloc+bst.LeafAlloc == 0 {
			ks.Bytes += int64(bst.InlineBucketInuse) // inline: its bytes sit in its parent's page
		}
	}
	err := db.view(func(tx *bolt.Tx) error {
		b := tx.Bucket([]byte(name))
		if b == nil {
			return nil
		}
		if len(subs) == 0 {
			pages(b)
			walkRecords(b, visit)
			return nil
		}
		c := b.Cursor()
		for k, v := c.First(); k != nil; k, v = c.Next() {
			if v != nil {
				visit(k, v)
			}
		}
		return nil
	})
	for _, sub := range subs {
		if err != nil {
			break
		}
		err = db.view(func(tx *bolt.Tx) error {
			if b := tx.Bucket([]byte(name)); b != nil {
				if nb := b.Bucket(sub); nb != nil {
					pages(nb)
					walkRecords(nb, visit)
				}
			}
			return nil
		})
	}
	return ks, secs, err
}

// walkRecords calls fn for every record under b, nested buckets included.
func walkRecords(b *bolt.Bucket, fn func(k, v []byte)) {
	c := b.Cursor()
	for k, v := c.First(); k != nil; k, v = c.Next() {
		if v == nil {
			if nb := b.Bucket(k); nb != nil {
				walkRecords(nb, fn)
			}
			continue
		}
		fn(k, v)
	}
}
