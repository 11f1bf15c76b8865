package gateway

import (
	"context"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// GetStoreStats implements AdminService: store.DB.Stats of the gateway's store.
func (g *Gateway) GetStoreStats(ctx context.Context, _ *pb.GetStoreStatsRequest) (*pb.GetStoreStatsResponse, error) {
	st, err := g.db.Stats()
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	out := &pb.GetStoreStatsResponse{Path: st.Path, FileBytes: st.FileBytes, PageSize: int32(st.PageSize), FreeBytes: st.FreeBytes,
		TrendPoints: st.TrendPoints, DeviceDays: st.DeviceDays, RawSeconds: st.RawSeconds}
	for _, k := range st.Kinds {
		out.Kinds = append(out.Kinds, &pb.StoreKindStats{Kind: k.Kind, Bytes: k.Bytes, InUseBytes: k.InUse, Records: k.Records, Items: k.Items})
	}
	return out, nil
}
