package main

import (
	"bytes"
	"fmt"
	"log/slog"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// A store whose devices would fill any ordinary disk within the warning's
// horizon gets the start-up warning; a small fleet does not.
func TestServeWarnsWhenFreeSpaceLastsFewDays(t *testing.T) {
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	now := time.Now()
	b := &store.Batch{}
	// 20,000 raw devices with capture: about 410 GB a day, so any disk
	// with less than 12 TB free lasts fewer than 30 days.
	for i := 0; i < 20_000; i++ {
		id := fmt.Sprintf("dev-%05d", i)
		b.Devices = append(b.Devices, &store.Device{ID: id, Mode: "raw"})
		b.Cursors = append(b.Cursors, store.Cursor{Device: id, LastSeq: 1, Chunks: 1, LastSeenMS: now.UnixMilli() - 60_000})
	}
	// One device silent for two days does not count.
	b.Devices = append(b.Devices, &store.Device{ID: "old", Mode: "raw"})
	b.Cursors = append(b.Cursors, store.Cursor{Device: "old", LastSeq: 1, Chunks: 1, LastSeenMS: now.UnixMilli() - 2*86_400_000})
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	c, err := db.Capacity(now.UnixMilli(), true)
	if err != nil {
		t.Fatal(err)
	}
	if c.Devices != 20_000 || c.RawCaptured != 20_000 || c.BytesPerDay != 20_000*(store.GrowthPerDeviceDay+store.RawGrowthPerDeviceDay) || c.DiskFree <= 0 {
		t.Fatalf("capacity %+v", c)
	}
	var logs bytes.Buffer
	log := slog.New(slog.NewTextHandler(&logs, nil))
	if msg := warnCapacity(db, now, true, log); !strings.Contains(msg, "lasts about") || !strings.Contains(logs.String(), "--raw-days") {
		t.Errorf("no warning for %.1f days left: %q, log %q", c.DaysLeft, msg, logs.String())
	}
	// Without raw capture the same fleet costs 2 MB a device-day: still
	// warned about below 1.2 TB free; with the devices' data a day old it
	// is no fleet at all.
	if msg := warnCapacity(db, now.Add(48*time.Hour), true, log); msg != "" {
		t.Errorf("warned with no device seen in the last day: %q", msg)
	}
	reg := prometheus.NewRegistry()
	reg.MustRegister(newStoreCollector(db, true))
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	got := map[string]float64{}
	for _, mf := range mfs {
		for _, m := range mf.GetMetric() {
			name := mf.GetName()
			for _, l := range m.GetLabel() {
				name += "/" + l.GetValue()
			}
			got[name] = m.GetGauge().GetValue()
		}
	}
	if got["pulsefleet_store_records/cursors"] != 20_001 || got["pulsefleet_store_records/devices"] != 20_001 ||
		got["pulsefleet_store_bytes/devices"] <= 0 || got["pulsefleet_store_disk_available_bytes"] <= 0 ||
		math.Abs(got["pulsefleet_store_capacity_remaining_seconds"]/(c.DaysLeft*86400)-1) > 0.01 { // the disk's free space moves meanwhile
		t.Errorf("gauges %v", got)
	}
	st, _ := db.Stats()
	if st.Kind("cursors").Records != 20_001 || st.Kind("devices").Records != 20_001 {
		t.Errorf("stats %+v", st.Kinds)
	}
}
