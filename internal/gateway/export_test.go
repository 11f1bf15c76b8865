package gateway

import (
	"context"
	"io"
	"math"
	"testing"
	"time"

	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// ExportTrend reads history in pages of exportBatch points, each in its own
// read transaction: across page boundaries (and a time range cutting into
// pages) it sends exactly the points the store holds, in order, each as
// pointProto makes it (missing values stay missing).
func TestExportTrendPagesEqualStore(t *testing.T) {
	h := newHarness(t, nil)
	base := time.Now().Add(-24 * time.Hour).UnixMilli()
	ids := []string{"page-a", "page-b"}
	for d, id := range ids {
		batch := &store.Batch{Devices: []*store.Device{{ID: id, Model: "seed"}}}
		for s := int64(0); s < int64(2*exportBatch+d*7+3); s++ {
			p := store.Point{Device: id, TimeMS: base + s*1000, SpO2: 90 + float64(s%9), Pulse: 60 + float64(s%40),
				PI: 1.5, SQI: 0.8, Ratio: 0.7, Flags: uint16(s % 3), Source: 1}
			if s%10 == 0 {
				p.SpO2, p.Ratio = math.NaN(), math.NaN()
			}
			batch.Points = append(batch.Points, p)
		}
		if err := h.db.Write(batch); err != nil {
			t.Fatal(err)
		}
	}
	for _, r := range []struct{ from, to int64 }{{0, 0}, {base + 999_500, base + 2_001_000}} {
		var want []*pb.TrendPoint
		to := r.to
		if to == 0 {
			to = math.MaxInt64
		}
		for _, id := range ids {
			err := h.db.Trend(id, r.from, to, func(p store.Point) bool {
				p.Device = id
				want = append(want, pointProto(&p))
				return true
			})
			if err != nil {
				t.Fatal(err)
			}
		}
		st, err := h.fleet().ExportTrend(context.Background(), &pb.ExportTrendRequest{FromUnixMs: r.from, ToUnixMs: r.to})
		if err != nil {
			t.Fatal(err)
		}
		var got []*pb.TrendPoint
		for {
			m, err := st.Recv()
			if err == io.EOF {
				break
			}
			if err != nil {
				t.Fatal(err)
			}
			if len(m.GetPoints()) > exportBatch {
				t.Fatalf("a message of %d points, want at most %d", len(m.GetPoints()), exportBatch)
			}
			got = append(got, m.GetPoints()...)
		}
		if len(want) < 2*exportBatch {
			t.Fatalf("range %v: %d points in the store: the test crosses no page", r, len(want))
		}
		if len(got) != len(want) {
			t.Fatalf("range %v: exported %d points, the store holds %d", r, len(got), len(want))
		}
		for i := range want {
			if !proto.Equal(got[i], want[i]) {
				t.Fatalf("range %v: point %d: exported %v, want %v", r, i, got[i], want[i])
			}
		}
		t.Logf("range %v: %d points", r, len(got))
	}
}

// BenchmarkExportPage compares building one ExportTrendResponse of a page
// of exportBatch points the way ExportTrend does (pageProto: slabs) with
// one pointProto per point; allocs/op does not depend on the machine's load:
//
//	go test -run '^$' -bench ExportPage -benchmem ./internal/gateway/
func BenchmarkExportPage(b *testing.B) {
	page := make([]store.Point, exportBatch)
	for i := range page {
		page[i] = store.Point{TimeMS: int64(i) * 1000, SpO2: 95, Pulse: 70, PI: 2, SQI: 0.9, Ratio: 0.6, Source: 1}
	}
	b.Run("slabs", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			_ = pageProto("dev", page)
		}
	})
	b.Run("per-point", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			m := &pb.ExportTrendResponse{}
			for i := range page {
				p := page[i]
				p.Device = "dev"
				m.Points = append(m.Points, pointProto(&p))
			}
		}
	})
}
