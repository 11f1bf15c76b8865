package gateway

import (
	"context"
	"testing"
	"time"
)

// The pacer lets through at most its rate (plus a burst of pacerBurst) over
// any span, shared by its callers, and waits for nothing when nil.
func TestPacerBoundsRate(t *testing.T) {
	now := time.Unix(1_700_000_000, 0)
	var slept time.Duration
	p := newPacer(100_000)
	p.now = func() time.Time { return now }
	p.sleep = func(_ context.Context, d time.Duration) error {
		slept += d
		now = now.Add(d) // the caller wakes when its units are due
		return nil
	}
	ctx := context.Background()
	start := now
	for i := 0; i < 1000; i++ { // 1,000,000 units in pages of 1,000
		if err := p.take(ctx, 1000); err != nil {
			t.Fatal(err)
		}
	}
	// 10 s of work at 100,000/s, less the 50 ms burst allowance.
	if got, want := now.Sub(start), 10*time.Second-pacerBurst; got != want {
		t.Fatalf("1,000,000 units at 100,000/s took %v, want %v", got, want)
	}
	// After an idle pause only the burst is free, not the whole pause.
	now = now.Add(time.Minute)
	slept = 0
	for i := 0; i < 10; i++ {
		p.take(ctx, 1000)
	}
	if want := 100*time.Millisecond - pacerBurst; slept != want {
		t.Fatalf("after a pause 10,000 units waited %v, want %v", slept, want)
	}
	if newPacer(0) != nil || newPacer(-1) != nil {
		t.Fatal("a rate <= 0 must give no pacer")
	}
	var none *pacer
	if err := none.take(ctx, 1<<30); err != nil {
		t.Fatal(err)
	}
	cctx, cancel := context.WithCancel(ctx)
	cancel()
	if err := none.take(cctx, 1); err == nil {
		t.Fatal("take on an ended context must fail")
	}
}

// A real wait ends early when the context ends.
func TestPacerWaitEndsWithContext(t *testing.T) {
	p := newPacer(1)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Millisecond)
	defer cancel()
	start := time.Now()
	if err := p.take(ctx, 3600); err == nil {
		t.Fatal("an hour's wait must end with the context")
	}
	if d := time.Since(start); d > 5*time.Second {
		t.Fatalf("waited %v after the context ended", d)
	}
}
