package store

import (
	"fmt"
	"syscall"
	"testing"
	"time"
)

// cpuTime is the process's CPU time (user + system) in nanoseconds: on a
// machine shared with other work, a benchmark's own cost is far less
// disturbed by the load than its wall time.
func cpuTime(b *testing.B) int64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		b.Fatal(err)
	}
	return ru.Utime.Nano() + ru.Stime.Nano()
}

// BenchmarkWriteTrend measures trend points written per second in batches of
// 1,000 points over 50 devices (target: >= 100,000 points/s), into the recent
// log and, a generation later, their per-device buckets.
func BenchmarkWriteTrend(b *testing.B) {
	db, _ := mustOpen(b)
	const devices, perBatch = 50, 1000
	batch := &Batch{}
	t := int64(0)
	b.ResetTimer()
	for i := 0; i < b.N; i += perBatch {
		batch.Reset()
		for j := 0; j < perBatch; j++ {
			batch.Points = append(batch.Points, Point{Device: fmt.Sprintf("dev-%03d", j%devices), TimeMS: t, SpO2: 97, Pulse: 70, PI: 2, SQI: 1})
			if j%devices == devices-1 {
				t += 1000
			}
		}
		if err := db.Write(batch); err != nil {
			b.Fatal(err)
		}
		if (i/perBatch)%10 == 9 {
			db.tail.genStart = time.Time{} // seal: the next writes compact it, as every genSpan in service
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "points/s")
}

// BenchmarkRead24h measures reading one device's 24 h trend at 1 Hz
// (86,400 points; target <= 20 ms).
func BenchmarkRead24h(b *testing.B) {
	db, _ := mustOpen(b)
	batch := &Batch{}
	for s := int64(0); s < 86_400; s++ {
		batch.Points = append(batch.Points, Point{Device: "d", TimeMS: 1_700_000_000_000 + s*1000, SpO2: 97})
		if len(batch.Points) == 10_000 {
			if err := db.Write(batch); err != nil {
				b.Fatal(err)
			}
			batch.Reset()
		}
	}
	if err := db.Write(batch); err != nil {
		b.Fatal(err)
	}
	// A day of history has long been moved out of the recent log.
	if err := db.CompactAll(); err != nil {
		b.Fatal(err)
	}
	b.ResetTimer()
	cpu0 := cpuTime(b)
	defer func() { b.ReportMetric(float64(cpuTime(b)-cpu0)/float64(b.N), "cpu-ns/op") }()
	for i := 0; i < b.N; i++ {
		n := 0
		db.Trend("d", 1_700_000_000_000, 1_700_000_000_000+86_400_000, func(Point) bool { n++; return true })
		if n != 86_400 {
			b.Fatalf("read %d points", n)
		}
	}
}
