package ingest

import (
	"context"
	"fmt"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

func TestPaceInterval(t *testing.T) {
	for _, c := range []struct{ d, want time.Duration }{
		{0, 0},
		{2 * time.Millisecond, 8 * time.Millisecond},
		{20 * time.Millisecond, 80 * time.Millisecond},
		{30 * time.Millisecond, maxPace},
		{maxPace, maxPace},
		{time.Second, time.Second}, // no wait after a commit that slow
	} {
		if got := paceInterval(c.d); got != c.want {
			t.Errorf("paceInterval(%v) = %v, want %v", c.d, got, c.want)
		}
	}
}

// Under constant load the writer does not commit back to back: a commit
// starts no sooner than paceInterval(previous commit's duration) after the
// previous one started (nor sooner than the batch delay after it ended). Timers never fire early, so the bound is exact whatever the
// machine's load; the records are written to a real store.
func TestWriterPacesCommitsUnderConstantLoad(t *testing.T) {
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	m, err := newMetrics(prometheus.NewRegistry(), func() float64 { return 0 })
	if err != nil {
		t.Fatal(err)
	}
	const batchDelay = time.Millisecond
	w := newWriter(db, batchDelay, 1<<20, m, time.Now, func(error, map[*device]bool) {}, func() {})
	type span struct{ start, end time.Time }
	var (
		mu    sync.Mutex
		spans []span
	)
	w.paced = func(start, end time.Time) {
		mu.Lock()
		spans = append(spans, span{start, end})
		mu.Unlock()
	}
	done := make(chan struct{})
	go func() { defer close(done); w.run() }()
	ctx := context.Background()
	deadline := time.Now().Add(30 * time.Second)
	for i := 0; ; i++ {
		mu.Lock()
		n := len(spans)
		mu.Unlock()
		if n >= 20 || time.Now().After(deadline) {
			break
		}
		r := &record{desc: &store.Device{ID: fmt.Sprintf("pace-%d", i%500), BatteryPct: -1}}
		if err := w.submit(ctx, r); err != nil {
			t.Fatal(err)
		}
		time.Sleep(50 * time.Microsecond)
	}
	w.close()
	<-done
	mu.Lock()
	defer mu.Unlock()
	if len(spans) < 5 {
		t.Fatalf("%d commits in 30 s of constant load", len(spans))
	}
	// The last commit follows the close at once; the others are paced.
	for i := 1; i < len(spans)-1; i++ {
		prev, cur := spans[i-1], spans[i]
		want := max(prev.end.Sub(prev.start)+batchDelay, paceInterval(prev.end.Sub(prev.start)))
		if gap := cur.start.Sub(prev.start); gap < want {
			t.Errorf("commit %d started %v after commit %d (which took %v) started, want at least %v",
				i, gap, i-1, prev.end.Sub(prev.start), want)
		}
	}
	if db.Commits() != uint64(len(spans)) {
		t.Errorf("store counted %d commits, the writer %d", db.Commits(), len(spans))
	}
}
