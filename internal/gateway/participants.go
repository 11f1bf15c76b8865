package gateway

import (
	"context"
	"errors"
	"fmt"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/participants"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// participantService implements ParticipantService over the gateway's
// store: enrolments of devices to pseudonymous study participants, and
// deletion on withdrawal. Roles (internal/auth): ListEnrolments viewer;
// Enrol and EndEnrolment operator, because putting a device on a participant
// or swapping it at night is a bedside task of ward or study staff, who
// should not need the admin credential for it (every call is audited, and
// an enrolment changes no data: it only says whose the data are);
// DeleteParticipant admin, since it destroys data.
type participantService struct {
	pb.UnimplementedParticipantServiceServer
	g *Gateway
}

// participantStatus maps the store's enrolment errors to API codes.
func participantStatus(err error) error {
	switch {
	case errors.Is(err, store.ErrInvalid):
		return status.Error(codes.InvalidArgument, err.Error())
	case errors.Is(err, store.ErrConflict), errors.Is(err, store.ErrStillOpen):
		return status.Error(codes.FailedPrecondition, err.Error())
	case errors.Is(err, store.ErrNotFound):
		return status.Error(codes.NotFound, err.Error())
	}
	return status.Error(codes.Unavailable, err.Error())
}

func enrolmentProto(e store.Enrolment) *pb.Enrolment {
	return &pb.Enrolment{EnrolmentId: e.ID, ParticipantId: e.Participant, DeviceId: e.Device, FromUnixMs: e.FromMS,
		ToUnixMs: e.ToMS, Note: e.Note, CreatedUnixMs: e.CreatedMS, CreatedBy: e.CreatedBy}
}

func (s *participantService) audit(ctx context.Context, action, device, detail string) *store.AuditEntry {
	return &store.AuditEntry{TimeMS: s.g.nowMS(), Actor: auth.ActorFrom(ctx), Action: action, Device: device,
		Detail: detail, Remote: auth.RemoteFrom(ctx)}
}

// Enrol implements ParticipantService.
func (s *participantService) Enrol(ctx context.Context, req *pb.EnrolRequest) (*pb.EnrolResponse, error) {
	in := req.GetEnrolment()
	if in == nil {
		return nil, status.Error(codes.InvalidArgument, "enrolment: required")
	}
	e := store.Enrolment{Participant: in.GetParticipantId(), Device: in.GetDeviceId(), FromMS: in.GetFromUnixMs(),
		ToMS: in.GetToUnixMs(), Note: in.GetNote(), CreatedMS: s.g.nowMS(), CreatedBy: auth.ActorFrom(ctx)}
	out, err := s.g.db.Enrol(e, s.audit(ctx, "participants.enrol", e.Device,
		fmt.Sprintf("participant %s on device %s for %s", e.Participant, e.Device, e.Interval())))
	if err != nil {
		return nil, participantStatus(err)
	}
	s.g.log.Info("participant enrolled", "participant", out.Participant, "device", out.Device, "interval", out.Interval().String(), "by", out.CreatedBy)
	return &pb.EnrolResponse{Enrolment: enrolmentProto(out)}, nil
}

// EndEnrolment implements ParticipantService.
func (s *participantService) EndEnrolment(ctx context.Context, req *pb.EndEnrolmentRequest) (*pb.EndEnrolmentResponse, error) {
	at := req.GetToUnixMs()
	if at == 0 {
		at = s.g.nowMS()
	}
	pid, dev := req.GetParticipantId(), req.GetDeviceId()
	out, err := s.g.db.EndEnrolment(pid, dev, at, s.audit(ctx, "participants.end", dev,
		fmt.Sprintf("participant %s%s: enrolment ended at %s", pid, onDevice(dev), time.UnixMilli(at).UTC().Format(time.RFC3339))))
	if err != nil {
		return nil, participantStatus(err)
	}
	return &pb.EndEnrolmentResponse{Enrolment: enrolmentProto(out)}, nil
}

func onDevice(dev string) string {
	if dev == "" {
		return ""
	}
	return " on device " + dev
}

// ListEnrolments implements ParticipantService.
func (s *participantService) ListEnrolments(_ context.Context, req *pb.ListEnrolmentsRequest) (*pb.ListEnrolmentsResponse, error) {
	es, err := s.g.db.Enrolments(req.GetParticipantId(), req.GetDeviceId())
	if err != nil {
		return nil, status.Error(codes.Internal, err.Error())
	}
	out := &pb.ListEnrolmentsResponse{}
	for _, e := range es {
		out.Enrolments = append(out.Enrolments, enrolmentProto(e))
	}
	return out, nil
}

// DeleteParticipant implements ParticipantService: the withdrawal of a
// participant. After the store's deletion, the live view of each device
// forgets a latest value that lay inside a deleted interval, so no command
// or page shows it as the device's last reading.
func (s *participantService) DeleteParticipant(ctx context.Context, req *pb.DeleteParticipantRequest) (*pb.DeleteParticipantResponse, error) {
	if !req.GetConfirm() {
		return nil, status.Error(codes.InvalidArgument, "confirm: must be true; deletion cannot be undone")
	}
	pid := req.GetParticipantId()
	if err := participants.CheckID("participant_id", pid); err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	del, err := s.g.db.DeleteParticipant(pid, s.g.nowMS(), auth.ActorFrom(ctx), auth.RemoteFrom(ctx))
	if err != nil {
		return nil, participantStatus(err)
	}
	for _, e := range del.Enrolments {
		s.g.forgetLatest(e.Device, e.FromMS, e.ToMS)
	}
	s.g.log.Info("participant deleted", "participant", pid, "trend_points", del.TrendPoints, "raw_captures", del.RawCaptures,
		"episodes", del.Episodes, "by", auth.ActorFrom(ctx))
	out := &pb.DeleteParticipantResponse{TrendPoints: del.TrendPoints, RawCaptures: del.RawCaptures, Episodes: del.Episodes,
		Reviews: del.Reviews, AuditId: del.AuditID}
	for _, e := range del.Enrolments {
		out.Enrolments = append(out.Enrolments, enrolmentProto(e))
	}
	return out, nil
}

// forgetLatest drops a device's live latest point when its time lies in
// [fromMS, toMS).
func (g *Gateway) forgetLatest(device string, fromMS, toMS int64) {
	g.ingest.ForgetLatest(device, fromMS, toMS)
}
