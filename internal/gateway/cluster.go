package gateway

import (
	"context"
	"time"

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

// silentFinder is the part of the cluster that finds the devices this
// gateway now owns that stream nowhere (package cluster implements it).
type silentFinder interface {
	MembersChanged() <-chan struct{}
	SilentDevices(ctx context.Context) (map[string][]byte, error)
	TTL() time.Duration
}

// silentScan adopts, after each membership change, the devices this
// gateway now owns that stream to no gateway (their gateway died and they
// did not reconnect), so their device_offline is announced here
// (ingest.Pipeline.AdoptSilent) rather than by nobody. The scan waits
// 2×TTL after the change, the time a device that is alive takes to
// reconnect and take its fence, so live devices are not put offline for
// the moment of their move; a scan etcd did not answer is tried again at
// the next watchdog tick. Owned by the watchdog goroutine.
type silentScan struct {
	due time.Time // zero = no scan pending
}

func (s *silentScan) step(ctx context.Context, g *Gateway) {
	sf, ok := g.opt.Cluster.(silentFinder)
	if !ok {
		return
	}
	select {
	case <-sf.MembersChanged():
		s.due = time.Now().Add(2 * sf.TTL())
	default:
	}
	if s.due.IsZero() || time.Now().Before(s.due) {
		return
	}
	silent, err := sf.SilentDevices(ctx)
	if err != nil {
		g.log.Warn("devices streaming nowhere not listed; trying again", "err", err)
		return
	}
	s.due = time.Time{}
	for id, state := range silent {
		if err := g.ingest.AdoptSilent(ctx, id, state); err != nil {
			g.log.Warn("device streaming nowhere not adopted", "device", id, "err", err)
		}
	}
	if len(silent) > 0 {
		g.log.Info("adopted devices that stream to no gateway of the fleet", "devices", len(silent))
	}
}
