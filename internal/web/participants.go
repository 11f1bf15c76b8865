package web

import (
	"context"
	"net/http"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The enrolment control's JSON (webui/participants.js), the API's messages
// through protojson like the rest of the page's JSON: reading a device's
// enrolments needs the viewer role; enrolling the device to a participant
// and ending its current enrolment need the operator role (the CLI's
// participants enrol/end) and, with a session, its CSRF token, like the
// page's other writes. They go through the gateway's ParticipantService
// calls, so the PID rule, the overlap check and the audit entry are the
// gRPC path's, and its error messages reach the operator unchanged.
// Deleting a participant's data stays with the CLI (admin role and
// --confirm); the page has no route for it.

// Enrolments is the part of the ParticipantService the page uses.
type Enrolments interface {
	Enrol(context.Context, *pb.EnrolRequest) (*pb.EnrolResponse, error)
	EndEnrolment(context.Context, *pb.EndEnrolmentRequest) (*pb.EndEnrolmentResponse, error)
	ListEnrolments(context.Context, *pb.ListEnrolmentsRequest) (*pb.ListEnrolmentsResponse, error)
}

// participantRoutes mounts the enrolment JSON on mux (none without
// Config.Enrolments).
func (s *Server) participantRoutes(mux *http.ServeMux) {
	if s.cfg.Enrolments == nil {
		return
	}
	mux.Handle("GET /api/device/{id}/enrolments", s.webHandler(auth.RoleViewer, s.webEnrolments))
	mux.Handle("POST /api/device/{id}/enrol", s.webHandler(auth.RoleOperator, s.webEnrol))
	mux.Handle("POST /api/device/{id}/enrolment/end", s.webHandler(auth.RoleOperator, s.webEndEnrolment))
}

// webEnrolments answers the device's enrolments, oldest first, and the
// gateway clock (an enrolment with to_unix_ms absent is still open).
func (s *Server) webEnrolments(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	resp, err := s.cfg.Enrolments.ListEnrolments(ctx, &pb.ListEnrolmentsRequest{DeviceId: r.PathValue("id")})
	if err != nil {
		return nil, err
	}
	out := struct {
		NowMS      int64                  `json:"now_ms"`
		Enrolments []Proto[*pb.Enrolment] `json:"enrolments"`
	}{NowMS: s.fleet.NowMS(), Enrolments: []Proto[*pb.Enrolment]{}}
	for _, e := range resp.GetEnrolments() {
		out.Enrolments = append(out.Enrolments, P(e))
	}
	return out, nil
}

// webEnrol enrols the device to a participant from now (or from
// from_unix_ms, for data already stored), open-ended.
func (s *Server) webEnrol(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	if err := checkSameOrigin(r); err != nil {
		return nil, err
	}
	var req struct {
		Participant string `json:"participant"`
		Note        string `json:"note"`
		FromMS      int64  `json:"from_unix_ms"` // 0 = now
	}
	if err := readJSON(r, &req); err != nil {
		return nil, err
	}
	if req.FromMS == 0 {
		req.FromMS = s.fleet.NowMS()
	}
	resp, err := s.cfg.Enrolments.Enrol(ctx, &pb.EnrolRequest{Enrolment: &pb.Enrolment{
		ParticipantId: req.Participant, DeviceId: r.PathValue("id"), FromUnixMs: req.FromMS, Note: req.Note}})
	if err != nil {
		return nil, err
	}
	return P(resp), nil
}

// webEndEnrolment ends the device's open enrolment of the participant the
// page showed (so an operator never ends one they did not see) now.
func (s *Server) webEndEnrolment(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	if err := checkSameOrigin(r); err != nil {
		return nil, err
	}
	var req struct {
		Participant string `json:"participant"`
	}
	if err := readJSON(r, &req); err != nil {
		return nil, err
	}
	if req.Participant == "" {
		return nil, badRequest("participant: required (the participant whose enrolment on this device ends)")
	}
	resp, err := s.cfg.Enrolments.EndEnrolment(ctx, &pb.EndEnrolmentRequest{ParticipantId: req.Participant, DeviceId: r.PathValue("id")})
	if err != nil {
		return nil, err
	}
	return P(resp), nil
}
