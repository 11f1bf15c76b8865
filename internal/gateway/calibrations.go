package gateway

import (
	"context"
	"errors"
	"fmt"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/controlplane"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// resolveStoredCalibration maps a calibration reference to a curve with
// calibration.Resolve, looking stored curves up in the gateway's store.
func (g *Gateway) resolveStoredCalibration(ref string, redNM, irNM float64) (estimator.Calibration, string, error) {
	c, applied, err := calibration.Resolve(ref, redNM, irNM, g.db.CalibrationCurve)
	if errors.Is(err, store.ErrNotFound) {
		return nil, "", fmt.Errorf("calibration %q is not stored (see `pulsefleet calibrations list`)", ref)
	}
	return c, applied, err
}

// streamCalibration resolves the calibration of a raw stream for the ingest
// pipeline: the one the device asked for, else the one assigned to it or
// to its model.
func (g *Gateway) streamCalibration(deviceID, model, requested string, redNM, irNM float64) (estimator.Calibration, string, error) {
	if requested == "" {
		requested = g.assignedCalibration(deviceID, model)
	}
	return g.opt.ResolveCalibration(requested, redNM, irNM)
}

// assignedCalibration returns the calibration assigned to a device or its
// model, from the gateway's copy of the assignments (read once, updated by
// AssignCalibration), so thousands of devices connecting at once do not each
// open a store transaction.
func (g *Gateway) assignedCalibration(deviceID, model string) string {
	g.calMu.RLock()
	defer g.calMu.RUnlock()
	if r, ok := g.calAssign["device:"+deviceID]; ok {
		return r
	}
	return g.calAssign["model:"+model]
}

// PutCalibration implements AdminService: stores a new version of a curve.
func (g *Gateway) PutCalibration(ctx context.Context, req *pb.PutCalibrationRequest) (*pb.PutCalibrationResponse, error) {
	if n := len(req.GetCurveYaml()); n == 0 || n > 64<<10 {
		return nil, status.Errorf(codes.InvalidArgument, "curve_yaml: %d bytes, want 1..65536", n)
	}
	c, err := calibration.Parse([]byte(req.GetCurveYaml()))
	if err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "curve_yaml: %v", err)
	}
	who := auth.ActorFrom(ctx)
	sc := store.Calibration{Name: c.Name, CurveYAML: req.GetCurveYaml(), CreatedMS: g.nowMS(), CreatedBy: who}
	audit := &store.AuditEntry{TimeMS: g.nowMS(), Actor: who, Action: "calibration.put", Detail: "calibration " + c.Name + ": " + c.Equation(), Remote: auth.RemoteFrom(ctx)}
	if g.opt.ControlPlane != nil {
		return g.putCalibrationShared(ctx, sc, audit) // shared.go
	}
	sc, err = g.db.PutCalibration(sc, audit)
	if err != nil {
		return nil, status.Errorf(codes.Unavailable, "%v", err)
	}
	return &pb.PutCalibrationResponse{Calibration: calibrationProto(sc)}, nil
}

func calibrationProto(c store.Calibration) *pb.Calibration {
	return &pb.Calibration{Name: c.Name, Version: c.Version, CurveYaml: c.CurveYAML, CreatedUnixMs: c.CreatedMS, CreatedBy: c.CreatedBy}
}

// ListCalibrations implements AdminService.
func (g *Gateway) ListCalibrations(ctx context.Context, _ *pb.ListCalibrationsRequest) (*pb.ListCalibrationsResponse, error) {
	cs, err := g.db.Calibrations()
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	as, err := g.db.CalibrationAssignments()
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	out := &pb.ListCalibrationsResponse{}
	for _, c := range cs {
		out.Calibrations = append(out.Calibrations, calibrationProto(c))
	}
	for t, r := range as {
		out.Assignments = append(out.Assignments, &pb.CalibrationAssignment{Target: t, Calibration: r})
	}
	return out, nil
}

// AssignCalibration implements AdminService. It applies from the device's
// next stream; in a fleet on etcd it is published to every gateway first,
// and the open streams it concerns take it from their next estimate
// (shared.go).
func (g *Gateway) AssignCalibration(ctx context.Context, req *pb.AssignCalibrationRequest) (*pb.AssignCalibrationResponse, error) {
	var target string
	switch {
	case req.GetModel() != "" && req.GetDeviceId() != "":
		return nil, status.Error(codes.InvalidArgument, "model, device_id: give exactly one")
	case req.GetModel() != "":
		target = "model:" + req.GetModel()
	case req.GetDeviceId() != "":
		if err := validID("device_id", req.GetDeviceId()); err != nil {
			return nil, status.Error(codes.InvalidArgument, err.Error())
		}
		target = "device:" + req.GetDeviceId()
	default:
		return nil, status.Error(codes.InvalidArgument, "model, device_id: give exactly one")
	}
	ref := req.GetCalibration()
	if ref != "" {
		_, applied, err := g.resolveStoredCalibration(ref, 660, 940)
		if err != nil {
			return nil, status.Errorf(codes.InvalidArgument, "calibration: %v", err)
		}
		if ref != "empirical" && ref != "beer-lambert" {
			ref = applied // pin the version assigned
		}
	}
	who := auth.ActorFrom(ctx)
	audit := &store.AuditEntry{TimeMS: g.nowMS(), Actor: who, Action: "calibration.assign",
		Device: req.GetDeviceId(), Detail: target + " -> " + ref, Remote: auth.RemoteFrom(ctx)}
	if cp := g.opt.ControlPlane; cp != nil {
		if err := cp.PublishAssignment(ctx, controlplane.Assignment{Target: target, Ref: ref, Device: req.GetDeviceId(), Actor: who}); err != nil {
			return nil, status.Errorf(codes.Unavailable, "%v", err)
		}
		audit.Detail += " (taken by gateway " + cp.Self() + ")"
	}
	if err := g.storeAssignment(ctx, target, ref, audit); err != nil {
		return nil, status.Errorf(codes.Unavailable, "%v", err)
	}
	return &pb.AssignCalibrationResponse{Assignment: &pb.CalibrationAssignment{Target: target, Calibration: ref}}, nil
}
