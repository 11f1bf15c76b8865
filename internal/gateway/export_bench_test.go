package gateway

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	rtmetrics "runtime/metrics"
	"runtime/pprof"
	"strconv"
	"strings"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// BenchmarkAckP99WithExport measures the acknowledgement latency (p50, p99)
// of PULSEFLEET_BENCH_DEVICES (default 1000) raw devices at 100 Hz, each
// variant on a fresh copy of one seeded store (200 devices x 6 h of trend
// points, 4.32 million: 1.2 hours of a 1,000-device fleet's 1 Hz trend):
//
//   - none: the devices alone, 10 s;
//   - export: full exports through FleetService.ExportTrend back to back,
//     paced by the gateway's default Options.ExportRate, 10 s;
//   - export-unpaced: the same with ExportRate < 0 (read as fast as the
//     client takes it), 10 s;
//   - tune: what `tune --gateway` asks of the gateway, snapshots through
//     AdminService.Backup back to back, 10 s;
//   - hour: one paced full export of the whole seeded history (an
//     hour-equivalent export) while the devices stream until it ends;
//   - hour-none: the devices alone for as long as hour streamed, so the
//     store growth of hour has its baseline from the same run.
//
// Each reports ack_p50_ms, ack_p99_ms, the points exported or snapshot
// MiB read, the process's CPU (cores; the load client runs in the same
// process) and the growth of the store's high-water mark (bbolt tx.Size)
// during the variant; the load average is logged at start and end. Run
// with -benchtime=1x:
//
//	go test -run '^$' -bench AckP99WithExport -benchtime=1x ./internal/gateway/
//
// PULSEFLEET_BENCH_CPUPROFILE=FILE writes a CPU profile of each variant's
// streaming window to FILE.VARIANT.
func BenchmarkAckP99WithExport(b *testing.B) {
	devices := 1000
	if v, err := strconv.Atoi(os.Getenv("PULSEFLEET_BENCH_DEVICES")); err == nil && v > 0 {
		devices = v
	}
	seeded := b.TempDir()
	h := newHarness(b, nil)
	seedHistory(b, h.db, 200, 6*3600)
	h.stop()
	copyStore(b, h.dir, seeded)
	b.Logf("load average at start: %s", loadAvg())
	defer func() { b.Logf("load average at end: %s", loadAvg()) }()
	var hourLong time.Duration
	for _, variant := range []string{"none", "export", "export-unpaced", "tune", "hour", "hour-none"} {
		b.Run(variant, func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				d := benchAckVariant(b, variant, devices, seeded, hourLong)
				if variant == "hour" {
					hourLong = d
				}
			}
		})
	}
}

// benchAckVariant runs one variant of BenchmarkAckP99WithExport and
// returns how long the devices streamed; hour-none streams for hourLong.
func benchAckVariant(b *testing.B, variant string, devices int, seeded string, hourLong time.Duration) time.Duration {
	h := &harness{t: b, dir: b.TempDir()}
	copyStore(b, seeded, h.dir)
	if variant == "export-unpaced" {
		h.mutate = func(o *Options) { o.ExportRate = -1 }
	}
	h.start()
	defer h.stop()
	size0 := h.db.Size()
	ctx, cancel := context.WithCancel(context.Background())
	var exported, snapshot atomic.Int64
	done := make(chan struct{})
	simCtx, simStop := context.WithCancel(context.Background())
	defer simStop()
	dur := 10 * time.Second
	switch variant {
	case "hour":
		dur = 10 * time.Minute // ended by simStop when the export is done
	case "hour-none":
		dur = max(hourLong, time.Second)
	}
	go func() {
		defer close(done)
		switch variant {
		case "export", "export-unpaced":
			for ctx.Err() == nil && benchExport(ctx, h, &exported) == nil {
			}
		case "hour":
			// The devices stream until the one export has ended.
			defer simStop()
			if err := benchExport(ctx, h, &exported); err != nil {
				b.Errorf("export: %v", err)
			}
		case "tune":
			admin := pb.NewAdminServiceClient(h.conn)
			for ctx.Err() == nil {
				st, err := admin.Backup(ctx, &pb.BackupRequest{})
				if err != nil {
					return
				}
				for {
					m, err := st.Recv()
					if err != nil {
						break
					}
					snapshot.Add(int64(len(m.GetChunk())))
				}
			}
		}
	}()
	cpu0, gc0 := benchCPU()
	if f := os.Getenv("PULSEFLEET_BENCH_CPUPROFILE"); f != "" {
		out, err := os.Create(f + "." + variant)
		if err != nil {
			b.Fatal(err)
		}
		defer out.Close()
		pprof.StartCPUProfile(out)
	}
	start := time.Now()
	rep, err := sim.Run(simCtx, sim.Options{Gateway: h.grpcAddr, Devices: devices, IDPrefix: "bench", Mode: sim.ModeRaw,
		RateHz: 100, Duration: dur, Seed: 7})
	secs := time.Since(start).Seconds()
	cancel()
	<-done
	pprof.StopCPUProfile()
	cpu1, gc1 := benchCPU()
	if err != nil {
		b.Fatal(err)
	}
	b.ReportMetric(rep.AckP50Ms, "ack_p50_ms")
	b.ReportMetric(rep.AckP99Ms, "ack_p99_ms")
	b.ReportMetric(float64(exported.Load()), "points_exported")
	b.ReportMetric(float64(snapshot.Load())/(1<<20), "snapshot_MiB")
	b.ReportMetric((cpu1-cpu0)/secs, "cores")
	b.ReportMetric((gc1-gc0)/secs, "gc_cores")
	b.ReportMetric(secs, "stream_s")
	b.ReportMetric(float64(h.db.Size()-size0)/(1<<20), "store_growth_MiB")
	if rep.StreamErrors != 0 || rep.FramesAcked == 0 {
		b.Errorf("sim: %d stream errors, %d acked (%s)", rep.StreamErrors, rep.FramesAcked, rep.LastError)
	}
	return time.Duration(secs * float64(time.Second))
}

// benchExport runs one full export through the harness's gateway and counts its points.
func benchExport(ctx context.Context, h *harness, points *atomic.Int64) error {
	st, err := h.fleet().ExportTrend(ctx, &pb.ExportTrendRequest{})
	if err != nil {
		return err
	}
	for {
		m, err := st.Recv()
		if err == io.EOF {
			return nil
		}
		if err != nil {
			return err
		}
		points.Add(int64(len(m.GetPoints())))
	}
}

// copyStore copies the store file and its identity file from one data
// directory to another.
func copyStore(b *testing.B, from, to string) {
	b.Helper()
	for _, name := range []string{store.FileName, store.IdentityFileName} {
		data, err := os.ReadFile(filepath.Join(from, name))
		if err != nil {
			b.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(to, name), data, 0o600); err != nil {
			b.Fatal(err)
		}
	}
}

// loadAvg is the first three fields of /proc/loadavg ("?" where unreadable).
func loadAvg() string {
	data, err := os.ReadFile("/proc/loadavg")
	if f := strings.Fields(string(data)); err == nil && len(f) >= 3 {
		return strings.Join(f[:3], " ")
	}
	return "?"
}

// benchCPU returns the process's CPU seconds (user and system, getrusage)
// and the garbage collector's estimated CPU seconds (runtime/metrics) so far.
func benchCPU() (total, gc float64) {
	var ru syscall.Rusage
	_ = syscall.Getrusage(syscall.RUSAGE_SELF, &ru)
	s := []rtmetrics.Sample{{Name: "/cpu/classes/gc/total:cpu-seconds"}}
	rtmetrics.Read(s)
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano()).Seconds(), s[0].Value.Float64()
}

// seedHistory writes seconds of one-per-second trend points for n devices.
func seedHistory(b *testing.B, db *store.DB, n int, seconds int64) {
	b.Helper()
	base := time.Now().Add(-48 * time.Hour).UnixMilli()
	for d := 0; d < n; d++ {
		id := fmt.Sprintf("hist-%04d", d)
		batch := &store.Batch{Devices: []*store.Device{{ID: id, Model: "seed"}}}
		for s := int64(0); s < seconds; s++ {
			batch.Points = append(batch.Points, store.Point{Device: id, TimeMS: base + s*1000, SpO2: 95, Pulse: 70, PI: 2, SQI: 0.9, Ratio: 0.6, Source: 1})
		}
		if err := db.Write(batch); err != nil {
			b.Fatal(err)
		}
	}
}
