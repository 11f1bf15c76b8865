package tune

import (
	"context"
	"runtime"
	"sync"
	"sync/atomic"
	"time"
)

// The worker pool and progress reporting that Run and EstimateStore share.

// workerCount is n, or runtime.GOMAXPROCS(0) when n <= 0.
func workerCount(n int) int {
	if n <= 0 {
		return runtime.GOMAXPROCS(0)
	}
	return n
}

// startProgress reports done/total to fn from one goroutine a few times a
// second until the returned stop is called, which waits for it and reports
// the final count.
func startProgress(fn func(done, total int), done *atomic.Int64, total int) (stop func()) {
	if fn == nil {
		return func() {}
	}
	fn(0, total)
	quit := make(chan struct{})
	var wg sync.WaitGroup
	wg.Go(func() {
		t := time.NewTicker(250 * time.Millisecond)
		defer t.Stop()
		last := 0
		for {
			select {
			case <-quit:
				return
			case <-t.C:
				if n := int(done.Load()); n != last {
					last = n
					fn(n, total)
				}
			}
		}
	})
	return func() {
		close(quit)
		wg.Wait()
		fn(int(done.Load()), total)
	}
}

// parallel runs fn(worker, job) for jobs 0..n-1 on workers goroutines,
// taking jobs in order. It returns the first error (or ctx's), after every
// goroutine has returned.
func parallel(ctx context.Context, workers, n int, fn func(w, job int) error) error {
	var next atomic.Int64
	var wg sync.WaitGroup
	var once sync.Once
	var first error
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	for w := range min(workers, max(n, 1)) {
		wg.Go(func() {
			for ctx.Err() == nil {
				j := int(next.Add(1) - 1)
				if j >= n {
					return
				}
				if err := fn(w, j); err != nil {
					once.Do(func() { first = err; cancel() })
					return
				}
			}
		})
	}
	wg.Wait()
	if first != nil {
		return first
	}
	return context.Cause(ctx)
}
