package gateway

import (
	"context"
	"fmt"
	"io"
	"os"
	"strconv"
	"sync/atomic"
	"testing"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// BenchmarkAckP99WithExport measures the 99th percentile of acknowledgement
// latency of PULSEFLEET_BENCH_DEVICES (default 1000) raw devices at 100 Hz
// streaming for 10 s, alone and while full exports of a seeded history
// (200 devices x 6 h of trend points) run back to back through
// FleetService.ExportTrend; it reports ack_p99_ms, the points exported and
// the growth of the store's high-water mark (bbolt's tx.Size). Run with -benchtime=1x:
//
//	go test -run '^$' -bench AckP99WithExport -benchtime=1x ./internal/gateway/
func BenchmarkAckP99WithExport(b *testing.B) {
	devices := 1000
	if v, err := strconv.Atoi(os.Getenv("PULSEFLEET_BENCH_DEVICES")); err == nil && v > 0 {
		devices = v
	}
	for _, withExport := range []bool{false, true} {
		b.Run(fmt.Sprintf("export=%v", withExport), func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				h := newHarness(b, nil)
				seedHistory(b, h.db, 200, 6*3600)
				size0 := h.db.Size()
				ctx, cancel := context.WithCancel(context.Background())
				var exported atomic.Int64
				done := make(chan struct{})
				go func() {
					defer close(done)
					for withExport && ctx.Err() == nil {
						st, err := h.fleet().ExportTrend(ctx, &pb.ExportTrendRequest{})
						if err != nil {
							return
						}
						for {
							m, err := st.Recv()
							if err == io.EOF || err != nil {
								break
							}
							exported.Add(int64(len(m.GetPoints())))
						}
					}
				}()
				rep, err := sim.Run(context.Background(), sim.Options{Gateway: h.grpcAddr, Devices: devices, IDPrefix: "bench", Mode: sim.ModeRaw,
					RateHz: 100, Duration: 10 * time.Second, Seed: 7})
				cancel()
				<-done
				if err != nil {
					b.Fatal(err)
				}
				b.ReportMetric(rep.AckP99Ms, "ack_p99_ms")
				b.ReportMetric(rep.AckP50Ms, "ack_p50_ms")
				b.ReportMetric(float64(exported.Load()), "points_exported")
				b.ReportMetric(float64(h.db.Size()-size0)/(1<<20), "store_growth_MiB")
				if rep.StreamErrors != 0 || rep.FramesAcked == 0 {
					b.Errorf("sim: %d stream errors, %d acked (%s)", rep.StreamErrors, rep.FramesAcked, rep.LastError)
				}
				h.stop()
			}
		})
	}
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
