package gateway

import (
	"context"
	"errors"
	"fmt"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/cluster"
	"github.com/pulsefleet/pulsefleet/internal/ids"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
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
	due     time.Time // zero = no scan pending
	retired time.Time // last look at the devices retired from the fleet
}

// retiredEvery: how often a gateway looks for devices retired through
// another gateway (one etcd read), besides after each membership change.
const retiredEvery = 30 * time.Second

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
	if rl, ok := g.opt.Cluster.(retiredLister); ok && time.Since(s.retired) >= retiredEvery {
		s.retired = time.Now()
		g.retireLocally(ctx, rl)
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
	if rl, ok := g.opt.Cluster.(retiredLister); ok {
		s.retired = time.Now()
		g.retireLocally(ctx, rl)
	}
}

// retiredLister lists the devices retired from the fleet (package cluster).
type retiredLister interface {
	RetiredDevices(ctx context.Context) (map[string]string, error)
}

// retireLocally ends what this gateway still holds of devices retired
// through another gateway (it was down then, or not asked: its store kept
// their alarm state), audited as a fleet sync naming the gateway that took
// it. Runs after each membership change and every retiredEvery.
func (g *Gateway) retireLocally(ctx context.Context, rl retiredLister) {
	retired, err := rl.RetiredDevices(ctx)
	if err != nil {
		g.log.Warn("retired devices not listed", "err", err)
		return
	}
	for id, by := range retired {
		if !g.ingest.HoldsAlarms(id) {
			continue
		}
		_, ended, err := g.ingest.Retire(ctx, id)
		if err != nil {
			g.log.Warn("retired device not ended here", "device", id, "err", err)
			continue
		}
		g.audit(ctx, "gateway", "device.retire", id, fmt.Sprintf("fleet sync: device retired through gateway %s; %d open episodes ended here", by, ended), "")
	}
}

// retirer is the part of the cluster that retires a device fleet-wide
// (package cluster, retire.go).
type retirer interface {
	Self() string
	Retire(ctx context.Context, deviceID string) error
}

// RetireDevice implements AdminService: the device's shared alarm state
// goes from etcd (no gateway adopts it again), then this gateway ends its
// open episodes (ingest.Pipeline.Retire); refused while it streams
// anywhere. Audited with the gateway that took it.
func (g *Gateway) RetireDevice(ctx context.Context, req *pb.RetireDeviceRequest) (*pb.RetireDeviceResponse, error) {
	id := req.GetDeviceId()
	if err := ids.Check("device_id", id); err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "%v", err)
	}
	if n := len(req.GetReason()); n > 200 {
		return nil, status.Errorf(codes.InvalidArgument, "reason: %d characters, want at most 200", n)
	}
	rt, ok := g.opt.Cluster.(retirer)
	if !ok {
		return nil, status.Errorf(codes.FailedPrecondition, "retire is for a fleet of gateways on etcd (serve --etcd); this gateway has no fleet: nothing of device %s was changed", id)
	}
	if s := g.ingest.StreamingHere(id); s {
		return nil, status.Errorf(codes.FailedPrecondition, "device %s is streaming to this gateway (%s): not retired (stop the device first)", id, rt.Self())
	}
	if err := rt.Retire(ctx, id); err != nil {
		var se *cluster.StreamingError
		if errors.As(err, &se) {
			return nil, status.Errorf(codes.FailedPrecondition, "%v", err)
		}
		return nil, status.Errorf(codes.Unavailable, "%v", err)
	}
	known, ended, err := g.ingest.Retire(ctx, id)
	if err != nil {
		return nil, ingestStatus(err)
	}
	detail := fmt.Sprintf("device retired from the fleet (shared alarm state deleted from etcd); %d open episodes ended here; taken by gateway %s", ended, rt.Self())
	if r := req.GetReason(); r != "" {
		detail += "; reason: " + r
	}
	g.audit(ctx, auth.ActorFrom(ctx), "device.retire", id, detail, auth.RemoteFrom(ctx))
	g.log.Info("device retired", "device", id, "episodes_ended", ended, "known_here", known, "by", auth.ActorFrom(ctx))
	return &pb.RetireDeviceResponse{Gateway: rt.Self(), EpisodesEnded: uint32(ended), KnownHere: known}, nil
}
