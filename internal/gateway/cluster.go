package gateway

import (
	"context"

	"github.com/pulsefleet/pulsefleet/internal/ingest"
)

// Cluster is the fleet membership the gateway asks about devices (package
// cluster over etcd implements it). Owner returns the address of the
// gateway that owns a device when it is another one ("" = this one).
// Acquire takes the device's fence before a stream is accepted; lost is
// called when the fence is taken away (the device moved to another member,
// or this gateway's membership lapsed) and the stream must end; release
// gives the fence back when the stream ended (internal/ingest/fence.go).
type Cluster interface {
	Owner(deviceID string) string
	Acquire(ctx context.Context, deviceID string, lost func(error)) (release func(), err error)
}

// fence is the pipeline's Fence: the cluster's, or none.
func (g *Gateway) fence() ingest.Fence {
	if g.opt.Cluster == nil {
		return nil
	}
	return g.opt.Cluster.Acquire
}

// alarmShare is the pipeline's AlarmShare: the cluster's when it carries
// alarm state (package cluster does), or none.
func (g *Gateway) alarmShare() ingest.AlarmShare {
	if a, ok := g.opt.Cluster.(ingest.AlarmShare); ok {
		return a
	}
	return nil
}
