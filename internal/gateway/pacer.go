package gateway

import (
	"context"
	"sync"
	"time"
)

// defaultExportRate is the history points per second that exports may read
// together (Options.ExportRate).
const defaultExportRate = 100_000

// pacer spreads work over time at a rate shared by all its callers: take(n)
// reserves n units after those already reserved and waits until their time
// comes. Reading history competes with live ingest for the same cores, and
// on a busy machine an export read as fast as the client takes it delays
// every acknowledgement; a rate bound keeps its share small and lets a
// long export finish all the same. A nil pacer does not wait.
type pacer struct {
	perSec float64
	now    func() time.Time
	sleep  func(ctx context.Context, d time.Duration) error

	mu   sync.Mutex
	next time.Time // when the last reserved unit is due
}

// newPacer paces at perSec units per second; perSec <= 0 gives nil (no bound).
func newPacer(perSec int) *pacer {
	if perSec <= 0 {
		return nil
	}
	return &pacer{perSec: float64(perSec), now: time.Now, sleep: sleepCtx}
}

// burst is how far behind the current time reservations may start, so a
// caller that paused does not get a flood.
const pacerBurst = 50 * time.Millisecond

// take reserves n units and waits until they are due, or ctx ends.
func (p *pacer) take(ctx context.Context, n int) error {
	if p == nil {
		return ctx.Err()
	}
	p.mu.Lock()
	now := p.now()
	if start := now.Add(-pacerBurst); p.next.Before(start) {
		p.next = start
	}
	p.next = p.next.Add(time.Duration(float64(n) / p.perSec * float64(time.Second)))
	wait := p.next.Sub(now)
	p.mu.Unlock()
	if wait <= 0 {
		return ctx.Err()
	}
	return p.sleep(ctx, wait)
}

func sleepCtx(ctx context.Context, d time.Duration) error {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}
