package ingest

import (
	"context"
	"math"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

const anchoredCurveYAML = "name: cam-a\nversion: 1\nmodel: linear\ncoefficients: [110, -14]\nratio_min: 0.3\nratio_max: 3\n" +
	"input: anchored_ratio\nanchor_s: 60\nanchor_min_sqi: 0.5\nanchor_min_seconds: 10\n"

// An assignment changed to a curve on the anchored ratio is not swapped
// into an open stream (whose estimator gives the raw R): the stream keeps
// its curve, and the next connection takes the new one with a new anchor.
// Even handed one, the stream's live curve withholds rather than apply it.
func TestAnchoredAssignmentIsNotSwappedIntoAnOpenStream(t *testing.T) {
	now := time.Date(2026, 12, 2, 12, 0, 0, 0, time.UTC)
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	var mu sync.Mutex
	assigned := "empirical"
	cfg := testConfig(db, func() time.Time { return now }, time.Millisecond,
		Limits{Messages: 1e6, Burst: 1e6, DeviceTime: 1e6, DeviceTimeBurst: 24 * time.Hour})
	cfg.Calibration = func(_, _, ref string, redNM, irNM float64) (estimator.Calibration, string, error) {
		mu.Lock()
		if ref == "" {
			ref = assigned
		}
		mu.Unlock()
		return calibration.Resolve(ref, redNM, irNM, func(string, uint32) (string, uint32, error) { return anchoredCurveYAML, 1, nil })
	}
	p, err := New(cfg)
	if err != nil {
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
	if err := s.start(ctx, &pb.Introduction{DeviceId: "cam-1", Model: "m", Mode: pb.Mode_MODE_RAW, AdcBits: 16}); err != nil {
		t.Fatal(err)
	}
	defer func() { s.finish(ctx); close(s.ended); s.cancel(nil) }()
	mu.Lock()
	assigned = "cam-a"
	mu.Unlock()
	if n := p.Recalibrate(context.Background(), func(string, string) bool { return true }); n != 0 {
		t.Fatalf("Recalibrate changed %d streams to a curve on the anchored ratio, want 0", n)
	}
	if s.calRef != "empirical" || p.devices.get("cam-1").desc.Calibration != "empirical" || s.anchor != nil {
		t.Fatalf("stream %q, device %q, anchor %v: want the open stream on empirical, no anchor", s.calRef, p.devices.get("cam-1").desc.Calibration, s.anchor)
	}
	if v, ok := s.live.SpO2(0.6); !ok || v != 95 {
		t.Fatalf("live curve at R=0.6: %v %v, want the empirical 95", v, ok)
	}
	c, _, err := cfg.Calibration("cam-1", "m", "cam-a", 0, 0)
	if err != nil {
		t.Fatal(err)
	}
	s.live.set(c)
	if v, ok := s.live.SpO2(1); ok || !math.IsNaN(v) {
		t.Fatalf("live curve handed an anchored curve gives %v %v at R=1, want no value", v, ok)
	}
}

// The device's anchor is kept by a reconnect within AnchorKeepS and not
// after a longer absence.
func TestAnchorKeptWithinAnchorKeepS(t *testing.T) {
	var mu sync.Mutex
	now := time.Date(2026, 12, 2, 12, 0, 0, 0, time.UTC)
	clock := func() time.Time { mu.Lock(); defer mu.Unlock(); return now }
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	cfg := testConfig(db, clock, time.Millisecond, Limits{Messages: 1e6, Burst: 1e6, DeviceTime: 1e6, DeviceTimeBurst: 24 * time.Hour})
	cfg.Calibration = func(_, _, ref string, redNM, irNM float64) (estimator.Calibration, string, error) {
		return calibration.Resolve("cam-a", redNM, irNM, func(string, uint32) (string, uint32, error) { return anchoredCurveYAML, 1, nil })
	}
	p, err := New(cfg)
	if err != nil {
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
	var anchors []*estimator.Anchor
	for _, away := range []time.Duration{0, AnchorKeepS * time.Second, (AnchorKeepS + 1) * time.Second} {
		mu.Lock()
		now = now.Add(away)
		mu.Unlock()
		ctx, cancel := context.WithCancelCause(context.Background())
		s := &stream{p: p, cancel: cancel, ended: make(chan struct{}), wake: make(chan struct{}, 1)}
		if err := s.start(ctx, &pb.Introduction{DeviceId: "cam-2", Model: "m", Mode: pb.Mode_MODE_RAW, AdcBits: 16}); err != nil {
			t.Fatal(err)
		}
		if s.anchor == nil || s.live != nil {
			t.Fatalf("stream on an anchored curve: anchor %v, live curve %v; want an anchor and no live swap", s.anchor, s.live)
		}
		anchors = append(anchors, s.anchor)
		s.finish(ctx)
		close(s.ended)
		s.cancel(nil)
	}
	if anchors[1] != anchors[0] {
		t.Error("a reconnect after AnchorKeepS s started a new anchor, want the same one")
	}
	if anchors[2] == anchors[1] {
		t.Error("a reconnect after AnchorKeepS+1 s kept the anchor, want a new one")
	}
}
