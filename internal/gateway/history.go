package gateway

import (
	"context"
	"sort"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// maxCoverageDevices bounds ListLedgerCoverageRequest.device_ids.
const maxCoverageDevices = 10_000

// ListLedgerCoverage implements FleetService: per device the sequence
// numbers this gateway's ledger holds, so a client merging several
// gateways' history can name what none of the reachable ones holds.
func (g *Gateway) ListLedgerCoverage(ctx context.Context, req *pb.ListLedgerCoverageRequest) (*pb.ListLedgerCoverageResponse, error) {
	if n := len(req.GetDeviceIds()); n > maxCoverageDevices {
		return nil, status.Errorf(codes.InvalidArgument, "device_ids: %d, want at most %d", n, maxCoverageDevices)
	}
	for _, id := range req.GetDeviceIds() {
		if err := validID("device_ids", id); err != nil {
			return nil, status.Error(codes.InvalidArgument, err.Error())
		}
	}
	cov, err := g.db.LedgerCoverage(req.GetDeviceIds()...)
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	return coverageProto(cov), nil
}

func coverageProto(cov map[string][]store.SeqSpan) *pb.ListLedgerCoverageResponse {
	out := &pb.ListLedgerCoverageResponse{Devices: make([]*pb.LedgerCoverage, 0, len(cov))}
	for id, spans := range cov {
		c := &pb.LedgerCoverage{DeviceId: id, Spans: make([]*pb.SequenceSpan, len(spans))}
		for i, s := range spans {
			c.Spans[i] = &pb.SequenceSpan{FirstSequence: s.First, LastSequence: s.Last,
				FirstDeviceTimeUnixMs: s.FirstDevMS, LastDeviceTimeUnixMs: s.LastDevMS}
		}
		out.Devices = append(out.Devices, c)
	}
	sort.Slice(out.Devices, func(i, j int) bool { return out.Devices[i].GetDeviceId() < out.Devices[j].GetDeviceId() })
	return out
}
