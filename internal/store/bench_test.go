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

// BenchmarkIngestBatch writes what the gateway writes for a raw fleet of
// 5,000 devices sending 4 messages/s each (a cursor and a ledger chunk per
// message, a trend point per device-second), in batches of 250, 1,000 and
// 4,000 messages: about 12 ms, 50 ms and 200 ms of that load. It reports
// the process's CPU per message (cpu-ns/msg): a commit rewrites the cursor
// and ledger pages of nearly every device at any of these sizes and syncs
// the file, so the cost per message falls as batches grow, which is why the
// gateway's writer paces its commits (internal/ingest/writer.go).
func BenchmarkIngestBatch(b *testing.B) {
	const devices = 5000
	for _, per := range []int{250, 1000, 4000} {
		b.Run(fmt.Sprintf("msgs=%d", per), func(b *testing.B) {
			db, _ := mustOpen(b)
			ids := make([]string, devices)
			seq := make([]uint64, devices)
			batch := &Batch{}
			for i := range ids {
				ids[i] = fmt.Sprintf("bench-%05d", i)
				batch.Devices = append(batch.Devices, &Device{ID: ids[i], BatteryPct: -1})
			}
			if err := db.Write(batch); err != nil {
				b.Fatal(err)
			}
			t0 := time.Now().UnixMilli()
			next := 0
			cpu0 := cpuTime(b)
			b.ResetTimer()
			for n := 0; n < b.N; n += per {
				batch.Reset()
				for j := 0; j < per; j++ {
					d := next % devices
					next++
					seq[d]++
					ms := t0 + int64(seq[d])*250
					batch.Cursors = append(batch.Cursors, Cursor{Device: ids[d], LastSeq: seq[d], Chunks: seq[d], Samples: 25 * seq[d], LastSeenMS: ms, LastDeviceMS: ms})
					batch.Chunks = append(batch.Chunks, Chunk{Device: ids[d], Seq: seq[d], DeviceTimeMS: ms, ArrivalMS: ms, Samples: 25})
					if seq[d]%4 == 0 {
						batch.Points = append(batch.Points, Point{Device: ids[d], TimeMS: ms, SpO2: 97, Pulse: 70, PI: 2, SQI: 1})
					}
				}
				if err := db.Write(batch); err != nil {
					b.Fatal(err)
				}
			}
			b.StopTimer()
			b.ReportMetric(float64(cpuTime(b)-cpu0)/float64(b.N), "cpu-ns/msg")
		})
	}
}
