package gateway

import (
	"math"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// exportBatch is the points per ExportTrendResponse, each page read in its
// own read transaction.
const exportBatch = 1000

// ExportTrend implements FleetService: the device lists, then the points
// of the requested devices, read in pages of exportBatch points, one short
// read transaction each, and paced by the gateway's history budget
// (Options.ExportRate, shared by every export).
func (g *Gateway) ExportTrend(req *pb.ExportTrendRequest, ss pb.FleetService_ExportTrendServer) error {
	from, to := max(req.GetFromUnixMs(), 0), req.GetToUnixMs()
	if to == 0 {
		to = math.MaxInt64
	}
	if to <= from {
		return status.Errorf(codes.InvalidArgument, "to_unix_ms: %d, want after from_unix_ms %d (0 = no end)", req.GetToUnixMs(), req.GetFromUnixMs())
	}
	if n := len(req.GetDeviceIds()); n > 10000 {
		return status.Errorf(codes.InvalidArgument, "device_ids: %d, want at most 10000", n)
	}
	recs, err := g.db.Devices()
	if err != nil {
		return status.Errorf(codes.Internal, "%v", err)
	}
	withTrend, err := g.db.TrendDevices()
	if err != nil {
		return status.Errorf(codes.Internal, "%v", err)
	}
	first := &pb.ExportTrendResponse{TrendDeviceIds: withTrend}
	known := map[string]bool{}
	for _, d := range recs {
		known[d.ID] = true
		first.Devices = append(first.Devices, &pb.Device{DeviceId: d.ID, Model: d.Model, Firmware: d.Firmware})
	}
	for _, id := range withTrend {
		known[id] = true
	}
	if err := ss.Send(first); err != nil {
		return err
	}
	if req.GetDevicesOnly() {
		return nil
	}
	ids := req.GetDeviceIds()
	if len(ids) == 0 {
		ids = withTrend
	}
	for _, id := range ids {
		if !known[id] {
			return status.Errorf(codes.NotFound, "device_ids: %q is not a device of this gateway", id)
		}
	}
	ctx := ss.Context()
	var page []store.Point
	for _, id := range ids {
		for next := from; next < to; {
			// One short read transaction per page, closed before the page
			// is sent: a slow reader never holds a transaction open.
			page, next, err = trendPage(g.db, id, next, to, page[:0])
			if err != nil {
				return status.Errorf(codes.Internal, "%v", err)
			}
			if len(page) == 0 {
				break
			}
			if err := g.history.take(ctx, len(page)); err != nil {
				return status.FromContextError(err).Err()
			}
			if err := ss.Send(pageProto(id, page)); err != nil {
				return err
			}
		}
	}
	return nil
}

// trendPage reads up to exportBatch points of device from [from, to) in one
// read transaction into buf and returns them with the time to resume from
// (to when the range is done). Points have distinct times per device.
func trendPage(db *store.DB, device string, from, to int64, buf []store.Point) ([]store.Point, int64, error) {
	next := to
	err := db.Trend(device, from, to, func(p store.Point) bool {
		buf = append(buf, p)
		if len(buf) < exportBatch {
			return true
		}
		next = p.TimeMS + 1
		return false
	})
	return buf, next, err
}

// pageProto is one ExportTrendResponse of the page's points, allocated in
// slabs (a few allocations per page instead of six per point); the values
// are ingest.TrendPointProto's.
func pageProto(device string, page []store.Point) *pb.ExportTrendResponse {
	slab := make([]pb.TrendPoint, len(page))
	vals := make([]float64, 0, 5*len(page))
	opt := func(v float64) *float64 {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return nil
		}
		vals = append(vals, v)
		return &vals[len(vals)-1]
	}
	out := &pb.ExportTrendResponse{Points: make([]*pb.TrendPoint, len(page))}
	for i := range page {
		p, t := &page[i], &slab[i]
		t.DeviceId, t.TimeUnixMs = device, p.TimeMS
		t.Spo2Pct, t.PulseBpm, t.PiPct, t.Sqi, t.Ratio = opt(p.SpO2), opt(p.Pulse), opt(p.PI), opt(p.SQI), opt(p.Ratio)
		t.Flags, t.Source = uint32(p.Flags), pb.Source(p.Source)
		out.Points[i] = t
	}
	return out
}
