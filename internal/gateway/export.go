package gateway

import (
	"math"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

const (
	exportBatch = 1000   // points per ExportTrendResponse
	exportPerTx = 10_000 // points per read transaction
)

// ExportTrend implements FleetService: the device lists, then the points
// of the requested devices, read in bounded slices (store.DB.TrendSliced).
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
	batch := &pb.ExportTrendResponse{}
	var sendErr error
	for _, id := range ids {
		err := g.db.TrendSliced(id, from, to, exportPerTx, func(p store.Point) bool {
			p.Device = id
			batch.Points = append(batch.Points, pointProto(&p))
			if len(batch.Points) >= exportBatch {
				if sendErr = ss.Send(batch); sendErr != nil {
					return false
				}
				batch = &pb.ExportTrendResponse{}
			}
			return ctx.Err() == nil
		})
		if sendErr != nil {
			return sendErr
		}
		if ctx.Err() != nil {
			return status.FromContextError(ctx.Err()).Err()
		}
		if err != nil {
			return status.Errorf(codes.Internal, "%v", err)
		}
	}
	if len(batch.Points) > 0 {
		return ss.Send(batch)
	}
	return nil
}
