package gateway

import (
	"context"
	"fmt"
	"maps"
	"slices"
	"strings"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/controlplane"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// SetDeviceLabels implements AdminService: the operator's labels of one
// device, in force on its description at once (for a device not seen here
// yet, from its first connection). In a fleet on etcd they are published to
// every gateway first (refused, with nothing changed, while etcd is
// unreachable).
func (g *Gateway) SetDeviceLabels(ctx context.Context, req *pb.SetDeviceLabelsRequest) (*pb.SetDeviceLabelsResponse, error) {
	if err := validID("device_id", req.GetDeviceId()); err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	if err := ingest.CheckLabels("labels", req.GetLabels()); err != nil {
		return nil, ingestStatus(err)
	}
	if n := len(req.GetReason()); n > 500 {
		return nil, status.Errorf(codes.InvalidArgument, "reason: %d characters, want at most 500", n)
	}
	who := auth.ActorFrom(ctx)
	audit := &store.AuditEntry{TimeMS: g.nowMS(), Actor: who, Action: "device.labels", Device: req.GetDeviceId(),
		Detail: labelsDetail(req.GetLabels(), req.GetReason()), Remote: auth.RemoteFrom(ctx)}
	if cp := g.opt.ControlPlane; cp != nil {
		l := controlplane.Labels{Device: req.GetDeviceId(), Labels: req.GetLabels(), Actor: who, Reason: req.GetReason()}
		if err := cp.PublishLabels(ctx, l); err != nil {
			return nil, status.Errorf(codes.Unavailable, "%v", err)
		}
		audit.Detail += " (taken by gateway " + cp.Self() + ")"
	}
	if err := g.ingest.SetLabels(ctx, req.GetDeviceId(), req.GetLabels(), audit); err != nil {
		return nil, ingestStatus(err)
	}
	return &pb.SetDeviceLabelsResponse{Labels: req.GetLabels()}, nil
}

// labelsDetail is the audit text of a label change: the labels in key order.
func labelsDetail(labels map[string]string, reason string) string {
	var b strings.Builder
	b.WriteString("labels")
	if len(labels) == 0 {
		b.WriteString(" removed")
	}
	for _, k := range slices.Sorted(maps.Keys(labels)) {
		fmt.Fprintf(&b, " %s=%q", k, labels[k])
	}
	if reason != "" {
		b.WriteString("; reason: " + reason)
	}
	return b.String()
}

// ApplyLabels takes a device's operator labels from the control plane (set
// through any gateway of the fleet, from names which). Labels this gateway
// holds as they are change nothing.
func (g *Gateway) ApplyLabels(l controlplane.Labels, from string) error {
	if maps.Equal(g.ingest.Labels(l.Device), l.Labels) {
		return nil
	}
	return g.ingest.SetLabels(context.Background(), l.Device, l.Labels, &store.AuditEntry{TimeMS: g.nowMS(), Actor: l.Actor, Action: "device.labels.sync",
		Device: l.Device, Detail: labelsDetail(l.Labels, l.Reason) + " from the fleet's control plane (taken by gateway " + from + ")"})
}
