package ingest

import (
	"context"
	"fmt"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

func TestPaceInterval(t *testing.T) {
	for _, c := range []struct{ d, want time.Duration }{
		{0, 0},
		{2 * time.Millisecond, 8 * time.Millisecond},
		{5 * time.Millisecond, 20 * time.Millisecond},
		{10 * time.Millisecond, maxPace},
		{maxPace, maxPace},
		{100 * time.Millisecond, 100 * time.Millisecond}, // no wait after a commit that slow
		{time.Second, time.Second},
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

// BenchmarkWriterPacing feeds the writer what 5,000 raw devices at 4
// messages/s each produce (20,000 data records/s: a cursor and a ledger
// chunk each, a trend point per device-second) into a real store, paced
// and unpaced, and reports the process's CPU per record (cpu-ns/msg, which
// the machine's other work disturbs far less than wall time) and commits/s.
// Run it with a fixed count, e.g. -benchtime 200000x (10 s of load each).
func BenchmarkWriterPacing(b *testing.B) {
	for _, unpaced := range []bool{false, true} {
		name := "paced"
		if unpaced {
			name = "unpaced"
		}
		b.Run(name, func(b *testing.B) { benchWriter(b, unpaced) })
	}
}

func benchWriter(b *testing.B, unpaced bool) {
	const devices, perTick, tick = 5000, 100, 5 * time.Millisecond // 20,000 records/s
	db, err := store.Open(b.TempDir(), store.Options{})
	if err != nil {
		b.Fatal(err)
	}
	defer db.Close()
	devs := make([]*device, devices)
	seed := &store.Batch{}
	for i := range devs {
		devs[i] = &device{id: fmt.Sprintf("bench-%05d", i)}
		seed.Devices = append(seed.Devices, &store.Device{ID: devs[i].id, BatteryPct: -1})
	}
	if err := db.Write(seed); err != nil {
		b.Fatal(err)
	}
	m, err := newMetrics(prometheus.NewRegistry(), func() float64 { return 0 })
	if err != nil {
		b.Fatal(err)
	}
	w := newWriter(db, 10*time.Millisecond, 4096, m, time.Now, func(error, map[*device]bool) {}, func() {})
	w.unpaced = unpaced
	done := make(chan struct{})
	go func() { defer close(done); w.run() }()
	ctx := context.Background()
	t0 := time.Now().UnixMilli()
	seq := make([]uint64, devices)
	commits0, cpu0 := db.Commits(), processCPU(b)
	b.ResetTimer()
	ticker := time.NewTicker(tick)
	defer ticker.Stop()
	for n := 0; n < b.N; {
		<-ticker.C
		for j := 0; j < perTick && n < b.N; j, n = j+1, n+1 {
			d := n % devices
			seq[d]++
			ms := t0 + int64(seq[d])*250
			r := &record{dev: devs[d], seq: seq[d], received: time.Now(),
				cursor: store.Cursor{Device: devs[d].id, LastSeq: seq[d], Chunks: seq[d], Samples: 25 * seq[d], LastSeenMS: ms, LastDeviceMS: ms},
				chunk:  &store.Chunk{Device: devs[d].id, Seq: seq[d], DeviceTimeMS: ms, ArrivalMS: ms, Samples: 25}}
			if seq[d]%4 == 0 {
				r.points = []store.Point{{Device: devs[d].id, TimeMS: ms, SpO2: 97, Pulse: 70, PI: 2, SQI: 1}}
			}
			if err := w.submit(ctx, r); err != nil {
				b.Fatal(err)
			}
		}
	}
	w.close()
	<-done
	b.StopTimer()
	b.ReportMetric(float64(processCPU(b)-cpu0)/float64(b.N), "cpu-ns/msg")
	b.ReportMetric(float64(db.Commits()-commits0)/b.Elapsed().Seconds(), "commits/s")
}

// processCPU is the process's CPU time (user + system) in nanoseconds.
func processCPU(b *testing.B) int64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		b.Fatal(err)
	}
	return ru.Utime.Nano() + ru.Stime.Nano()
}
