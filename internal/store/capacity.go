package store

import (
	"fmt"
	"math"
	"path/filepath"
	"syscall"

	bolt "go.etcd.io/bbolt"
)

// What a device-day costs on disk: the store file's growth per device-day,
// free pages included, measured by BenchmarkStorageCost (README, "Storage
// cost"; rounded up): trend and ledger of any device (one trend point per
// second, up to four data messages per second), and the raw samples a
// 100 Hz raw device adds with raw capture on.
const (
	GrowthPerDeviceDay    = 2_000_000  // bytes; measured 1.97 MB
	RawGrowthPerDeviceDay = 18_500_000 // bytes; measured 20.2 MB in all, less the trend and ledger above
)

// Capacity is how long the data directory's free space lasts at the
// current rate.
type Capacity struct {
	Dir          string  `json:"dir"`
	DiskFree     int64   `json:"disk_free_bytes"`  // available to this process on the file system
	StoreFree    int64   `json:"store_free_bytes"` // free pages inside the store file, reused before it grows
	Devices      int     `json:"devices"`          // devices with data accepted in the last day
	RawCaptured  int     `json:"raw_captured"`     // of them, raw devices whose samples are kept
	BytesPerDay  float64 `json:"bytes_per_day"`
	DaysLeft     float64 `json:"days_left"` // +Inf when nothing is arriving
	AssumedRawHz float64 `json:"assumed_raw_hz"`
}

// Capacity estimates how many days the free space of the store's data
// directory lasts: devices with data accepted in the day before nowMS
// (their cursors), at GrowthPerDeviceDay each, plus RawGrowthPerDeviceDay
// for each raw-mode device when captureRaw (assuming 100 Hz). It reads the
// cursors and device records only.
func (db *DB) Capacity(nowMS int64, captureRaw bool) (Capacity, error) {
	c := Capacity{Dir: filepath.Dir(db.path), AssumedRawHz: 100}
	var fs syscall.Statfs_t
	if err := syscall.Statfs(c.Dir, &fs); err != nil {
		return c, fmt.Errorf("store: free space of %s: %w", c.Dir, err)
	}
	c.DiskFree = int64(fs.Bavail) * int64(fs.Bsize)
	err := db.view(func(tx *bolt.Tx) error {
		st := tx.DB().Stats()
		c.StoreFree = int64(st.FreePageN) * int64(tx.DB().Info().PageSize)
		devs := tx.Bucket(bDevices)
		return tx.Bucket(bCursors).ForEach(func(k, v []byte) error {
			var cur Cursor
			if err := decodeCursor(v, &cur); err != nil {
				return fmt.Errorf("cursor %q: %w", k, err)
			}
			if cur.LastSeenMS < nowMS-86_400_000 {
				return nil
			}
			c.Devices++
			if captureRaw {
				var d Device
				if dv := devs.Get(k); dv != nil && decJSON(dv, &d) == nil && d.Mode == "raw" {
					c.RawCaptured++
				}
			}
			return nil
		})
	})
	if err != nil {
		return c, fmt.Errorf("store: capacity: %w", err)
	}
	c.BytesPerDay = float64(c.Devices)*GrowthPerDeviceDay + float64(c.RawCaptured)*RawGrowthPerDeviceDay
	c.DaysLeft = math.Inf(1)
	if c.BytesPerDay > 0 {
		c.DaysLeft = float64(c.DiskFree+c.StoreFree) / c.BytesPerDay
	}
	return c, nil
}
