package main

import (
	"fmt"
	"log/slog"
	"math"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// capacityWarnDays: serve warns at start-up when the data directory's free
// space lasts fewer days than this at the current rate (team choice: a
// month, the length of a typical pilot, leaves time to add disk).
const capacityWarnDays = 30

// warnCapacity logs a warning when the store's free space lasts fewer than
// capacityWarnDays at the current rate; it returns the warning (or "").
func warnCapacity(db *store.DB, now time.Time, captureRaw bool, log *slog.Logger) string {
	c, err := db.Capacity(now.UnixMilli(), captureRaw)
	if err != nil {
		log.Warn("store capacity: cannot estimate", "err", err)
		return ""
	}
	if c.DaysLeft >= capacityWarnDays {
		return ""
	}
	msg := fmt.Sprintf("store: the free space of %s (%.1f GiB on disk, %.1f GiB free inside the store) lasts about %.1f days at the current rate "+
		"(%d devices with data in the last day, %d of them raw with --capture-raw; about %.0f MB a day, README \"Storage cost\"), "+
		"fewer than %d: add disk, or lower --trend-days / --raw-days",
		c.Dir, float64(c.DiskFree)/(1<<30), float64(c.StoreFree)/(1<<30), c.DaysLeft, c.Devices, c.RawCaptured, c.BytesPerDay/1e6, capacityWarnDays)
	log.Warn(msg)
	return msg
}

// storeCollector exports where the store's bytes go (store.DB.Stats) and
// how long its free space lasts (store.DB.Capacity) as gauges. Stats reads
// every page, so it is refreshed at most every statsEvery, during a scrape;
// Capacity reads the cursors only and is fresh at every scrape.
type storeCollector struct {
	db         *store.DB
	captureRaw bool
	now        func() time.Time
	statsEvery time.Duration

	mu      sync.Mutex
	stats   *store.Stats
	statsAt time.Time

	bytes, records, items, fileBytes, freeBytes, diskFree, left *prometheus.Desc
}

func newStoreCollector(db *store.DB, captureRaw bool) *storeCollector {
	return &storeCollector{db: db, captureRaw: captureRaw, now: time.Now, statsEvery: 10 * time.Minute,
		bytes:     prometheus.NewDesc("pulsefleet_store_bytes", "Bytes of the store file's pages holding each kind of record (top-level bucket); refreshed at most every 10 minutes.", []string{"kind"}, nil),
		records:   prometheus.NewDesc("pulsefleet_store_records", "Records of each kind (top-level bucket); refreshed at most every 10 minutes.", []string{"kind"}, nil),
		items:     prometheus.NewDesc("pulsefleet_store_items", "What each kind's records hold: trend points, ledger messages, raw chunks, else records; refreshed at most every 10 minutes.", []string{"kind"}, nil),
		fileBytes: prometheus.NewDesc("pulsefleet_store_file_bytes", "The store file's high-water mark in bytes; refreshed at most every 10 minutes.", nil, nil),
		freeBytes: prometheus.NewDesc("pulsefleet_store_free_page_bytes", "Bytes of free pages inside the store file, reused before it grows; refreshed at most every 10 minutes.", nil, nil),
		diskFree:  prometheus.NewDesc("pulsefleet_store_disk_available_bytes", "Bytes available on the data directory's file system.", nil, nil),
		left:      prometheus.NewDesc("pulsefleet_store_capacity_remaining_seconds", "How long the free space (disk and free pages) lasts at the current rate, estimated from the devices with data in the last day (README \"Storage cost\"); +Inf when nothing arrives.", nil, nil),
	}
}

func (c *storeCollector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{c.bytes, c.records, c.items, c.fileBytes, c.freeBytes, c.diskFree, c.left} {
		ch <- d
	}
}

func (c *storeCollector) Collect(ch chan<- prometheus.Metric) {
	now := c.now()
	c.mu.Lock()
	if c.stats == nil || now.Sub(c.statsAt) >= c.statsEvery {
		if st, err := c.db.Stats(); err == nil {
			c.stats, c.statsAt = st, now
		}
	}
	st := c.stats
	c.mu.Unlock()
	if st != nil {
		for _, k := range st.Kinds {
			ch <- prometheus.MustNewConstMetric(c.bytes, prometheus.GaugeValue, float64(k.Bytes), k.Kind)
			ch <- prometheus.MustNewConstMetric(c.records, prometheus.GaugeValue, float64(k.Records), k.Kind)
			ch <- prometheus.MustNewConstMetric(c.items, prometheus.GaugeValue, float64(k.Items), k.Kind)
		}
		ch <- prometheus.MustNewConstMetric(c.fileBytes, prometheus.GaugeValue, float64(st.FileBytes))
		ch <- prometheus.MustNewConstMetric(c.freeBytes, prometheus.GaugeValue, float64(st.FreeBytes))
	}
	if cp, err := c.db.Capacity(now.UnixMilli(), c.captureRaw); err == nil {
		ch <- prometheus.MustNewConstMetric(c.diskFree, prometheus.GaugeValue, float64(cp.DiskFree))
		left := cp.DaysLeft * 86400
		if math.IsInf(cp.DaysLeft, 1) {
			left = math.Inf(1)
		}
		ch <- prometheus.MustNewConstMetric(c.left, prometheus.GaugeValue, left)
	}
}
