package gateway

import (
	"context"
	"errors"
	"fmt"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/controlplane"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Calibrations and their assignments in a fleet on etcd: published through
// the control plane first (refused, with nothing changed, while etcd is
// unreachable), then stored here; the other gateways store them from their
// watch (ApplyCalibration, ApplyAssignment).

// putCalibrationShared stores a new calibration version for the fleet: the
// version is the fleet's (controlplane.PublishCalibration), then stored here.
func (g *Gateway) putCalibrationShared(ctx context.Context, c store.Calibration, audit *store.AuditEntry) (*pb.PutCalibrationResponse, error) {
	cp := g.opt.ControlPlane
	next := uint32(1)
	if have, err := g.db.GetCalibration(c.Name, 0); err == nil {
		next = have.Version + 1
	} else if !errors.Is(err, store.ErrNotFound) {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	c, err := cp.PublishCalibration(ctx, c, next)
	if err != nil {
		return nil, status.Errorf(codes.Unavailable, "%v", err)
	}
	audit.Detail += " (version " + calRef(c) + ", taken by gateway " + cp.Self() + ")"
	if _, err := g.db.PutCalibrationVersion(c, audit); err != nil {
		return nil, status.Errorf(codes.Unavailable, "put calibration: published to the fleet but not stored here: %v", err)
	}
	return &pb.PutCalibrationResponse{Calibration: calibrationProto(c)}, nil
}

func calRef(c store.Calibration) string { return fmt.Sprintf("%s@v%d", c.Name, c.Version) }

// ApplyCalibration takes a calibration version from the control plane (put
// through any gateway of the fleet, from names which) into this store. A
// version this store already holds as is changes nothing; one it holds with
// another curve (put here alone before joining the fleet) is not replaced:
// the error says so and is logged.
func (g *Gateway) ApplyCalibration(c store.Calibration, from string) error {
	_, err := g.db.PutCalibrationVersion(c, &store.AuditEntry{TimeMS: g.nowMS(), Actor: c.CreatedBy, Action: "calibration.sync",
		Detail: "calibration " + calRef(c) + " from the fleet's control plane (taken by gateway " + from + ")"})
	return err
}

// ApplyAssignment takes a calibration assignment from the control plane:
// stored here with an audit entry and in force at once (the open streams
// it concerns change curve from their next estimate). One this store holds
// as is changes nothing.
func (g *Gateway) ApplyAssignment(a controlplane.Assignment, from string) error {
	g.calMu.RLock()
	have, ok := g.calAssign[a.Target]
	g.calMu.RUnlock()
	if ok && have == a.Ref || !ok && a.Ref == "" {
		return nil
	}
	return g.storeAssignment(context.Background(), a.Target, a.Ref, &store.AuditEntry{TimeMS: g.nowMS(), Actor: a.Actor, Action: "calibration.sync", Device: a.Device,
		Detail: a.Target + " -> " + a.Ref + " from the fleet's control plane (taken by gateway " + from + ")"})
}

// storeAssignment stores an assignment (ref "" removes it) and puts it in
// force: the gateway's copy of the assignments, and in a fleet on etcd the
// open raw streams of the devices it concerns, which take the curve from
// their next estimate (ingest.Pipeline.Recalibrate). Without a control
// plane an assignment applies from each device's next stream, as it always
// did.
func (g *Gateway) storeAssignment(ctx context.Context, target, ref string, audit *store.AuditEntry) error {
	if err := g.db.AssignCalibration(target, ref, audit); err != nil {
		return err
	}
	g.calMu.Lock()
	if ref == "" {
		delete(g.calAssign, target)
	} else {
		g.calAssign[target] = ref
	}
	g.calMu.Unlock()
	if g.opt.ControlPlane == nil {
		return nil
	}
	n := g.ingest.Recalibrate(ctx, func(device, model string) bool {
		return target == "device:"+device || target == "model:"+model
	})
	if n > 0 {
		g.log.Info("calibration assignment changed; open streams use it from their next estimate", "target", target, "calibration", ref, "streams", n)
	}
	return nil
}
