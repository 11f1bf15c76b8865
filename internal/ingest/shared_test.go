package ingest

import (
	"context"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// An assignment that changes while a raw stream starts, after the stream
// read the assignments but before it became its device's (where
// Recalibrate cannot see it), is in force on that stream from its start:
// the stream does not keep the old curve for its whole session. The change
// is injected inside the stream's own lookup: no timing involved.
func TestAssignmentChangedWhileAStreamStartsIsInForce(t *testing.T) {
	now := time.Date(2026, 12, 2, 12, 0, 0, 0, time.UTC)
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	var p *Pipeline
	var mu sync.Mutex
	assigned, calls := "empirical", 0
	cfg := testConfig(db, func() time.Time { return now }, time.Millisecond,
		Limits{Messages: 1e6, Burst: 1e6, DeviceTime: 1e6, DeviceTimeBurst: 24 * time.Hour})
	cfg.Calibration = func(_, _, ref string, redNM, irNM float64) (estimator.Calibration, string, error) {
		mu.Lock()
		calls++
		first := calls == 1
		if ref == "" {
			ref = assigned
		}
		if first {
			assigned = "beer-lambert" // the change lands now ...
		}
		mu.Unlock()
		c, applied, err := calibration.Resolve(ref, redNM, irNM, nil)
		if first {
			p.Recalibrate(context.Background(), func(string, string) bool { return true }) // ... and is put in force
		}
		return c, applied, err
	}
	if p, err = New(cfg); err != nil {
		t.Fatal(err)
	}
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { defer wg.Done(); p.w.run() }()
	defer func() {
		p.w.close()
		wg.Wait()
		db.Close()
	}()
	ctx, cancel := context.WithCancelCause(context.Background())
	s := &stream{p: p, cancel: cancel, ended: make(chan struct{}), wake: make(chan struct{}, 1)}
	if err := s.start(ctx, &pb.Introduction{DeviceId: "cal-1", Model: "m", Mode: pb.Mode_MODE_RAW, AdcBits: 16, RedWavelengthNm: 660, IrWavelengthNm: 940}); err != nil {
		t.Fatal(err)
	}
	defer func() { s.finish(ctx); close(s.ended); s.cancel(nil) }()
	want := "beer-lambert@660/940nm"
	if s.calRef != want || p.devices.get("cal-1").desc.Calibration != want {
		t.Fatalf("stream calibration %q, device description %q; want %q (the assignment changed while it started)", s.calRef, p.devices.get("cal-1").desc.Calibration, want)
	}
	be, _ := estimator.BeerLambert(660, 940)
	r := 0.6
	got, _ := s.live.SpO2(r)
	if exp, _ := be.SpO2(r); got != exp {
		t.Fatalf("the stream's curve at R=%v: %v, want the Beer-Lambert %v", r, got, exp)
	}
}
