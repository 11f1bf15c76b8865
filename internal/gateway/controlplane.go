package gateway

import (
	"bytes"
	"context"
	"errors"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/controlplane"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// ControlPlane is the fleet's shared settings (package controlplane over
// etcd implements it). PublishToken writes a credential for every gateway
// and fails, before anything is changed, while the control plane is
// unreachable; Status says whether it answers (for /readyz); Self names
// this gateway in audit entries.
type ControlPlane interface {
	PublishToken(ctx context.Context, t store.Token) error
	PublishProfile(ctx context.Context, pr controlplane.Profile) error
	PublishCalibration(ctx context.Context, c store.Calibration, atLeast uint32) (store.Calibration, error)
	PublishAssignment(ctx context.Context, a controlplane.Assignment) error
	PublishLabels(ctx context.Context, l controlplane.Labels) error
	Status() (up bool, detail string)
	Self() string
}

// issueShared issues a credential through the control plane: published
// first (refused, with nothing stored, while etcd is unreachable), then
// stored here; the other gateways store it from their watch.
func (g *Gateway) issueShared(ctx context.Context, spec auth.TokenSpec) (*pb.IssueTokenResponse, error) {
	cp := g.opt.ControlPlane
	secret, t, audit, err := auth.NewToken(spec, auth.ActorFrom(ctx), auth.RemoteFrom(ctx), g.opt.Now())
	if err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	if err := cp.PublishToken(ctx, t); err != nil {
		return nil, status.Errorf(codes.Unavailable, "%v", err)
	}
	audit.Detail += " (taken by gateway " + cp.Self() + ")"
	if err := g.db.PutToken(t, audit); err != nil {
		return nil, status.Errorf(codes.Unavailable, "issue token: published to the fleet but not stored here: %v", err)
	}
	g.auth.Put(t)
	g.log.Info("credential issued for the fleet", "id", t.ID, "kind", t.Kind, "subject", t.Subject, "role", t.Role, "by", t.IssuedBy)
	return &pb.IssueTokenResponse{Secret: secret, Token: auth.TokenProto(t)}, nil
}

// revokeShared revokes a credential through the control plane.
func (g *Gateway) revokeShared(ctx context.Context, id string) (*pb.RevokeTokenResponse, error) {
	cp := g.opt.ControlPlane
	ts, err := g.db.Tokens()
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	var t store.Token
	for _, x := range ts {
		if x.ID == id {
			t = x
		}
	}
	if t.ID == "" {
		return nil, status.Errorf(codes.NotFound, "token_id: %q is not a credential of this fleet", id)
	}
	if t.RevokedMS == 0 {
		t.RevokedMS = g.nowMS()
	}
	if err := cp.PublishToken(ctx, t); err != nil {
		return nil, status.Errorf(codes.Unavailable, "%v", err)
	}
	out, err := g.db.RevokeToken(id, t.RevokedMS, &store.AuditEntry{TimeMS: t.RevokedMS, Actor: auth.ActorFrom(ctx), Action: "token.revoke",
		Detail: "credential " + id + " (taken by gateway " + cp.Self() + ")", Remote: auth.RemoteFrom(ctx)})
	if err != nil {
		return nil, status.Errorf(codes.Unavailable, "revoke token: published to the fleet but not stored here: %v", err)
	}
	g.auth.Put(out) // ends the credential's open streams
	return &pb.RevokeTokenResponse{Token: auth.TokenProto(out)}, nil
}

// ApplyToken takes a credential from the control plane (issued or revoked
// through any gateway of the fleet, from names which): stored here with an
// audit entry, in force at once (a revocation ends its open streams). A
// credential this store already holds as is changes nothing.
func (g *Gateway) ApplyToken(t store.Token, from string) error {
	have, err := g.db.TokenByHash(t.Hash)
	switch {
	case err == nil && have == t:
		return nil
	case err != nil && !errors.Is(err, store.ErrNotFound):
		return err
	}
	action, detail := "token.sync", "credential "+t.ID+" for "+t.Subject+" from the fleet's control plane (taken by gateway "+from+")"
	if t.RevokedMS != 0 {
		detail = "revocation of " + detail
	}
	if err := g.db.PutToken(t, &store.AuditEntry{TimeMS: g.nowMS(), Actor: t.IssuedBy, Action: action, Detail: detail}); err != nil {
		return err
	}
	g.auth.Put(t)
	return nil
}

// controlPlaneStatus is "" when there is no control plane or it answers.
func (g *Gateway) controlPlaneStatus() string {
	if g.opt.ControlPlane == nil {
		return ""
	}
	if up, detail := g.opt.ControlPlane.Status(); !up {
		return detail
	}
	return ""
}

// applyingKey marks the context of a profile change applied from the
// control plane (it is not published again).
type applyingKey struct{}

type applying struct{ actor, from string }

// profileChange publishes a profile change taken here to the fleet (before
// anything is changed; refused while etcd is unreachable), or recognises one
// applied from the control plane. It returns the audit's actor and action
// and what to add to its detail.
func (g *Gateway) profileChange(ctx context.Context, device string, text []byte, reason string) (actor, action, note string, err error) {
	if a, ok := ctx.Value(applyingKey{}).(applying); ok {
		return a.actor, "profile.sync", " (from the fleet's control plane, taken by gateway " + a.from + ")", nil
	}
	actor, action = auth.ActorFrom(ctx), "profile.set"
	cp := g.opt.ControlPlane
	if cp == nil {
		return actor, action, "", nil
	}
	if err := cp.PublishProfile(ctx, controlplane.Profile{Device: device, YAML: text, Actor: actor, Reason: reason}); err != nil {
		return "", "", "", status.Errorf(codes.Unavailable, "%v", err)
	}
	return actor, action, " (taken by gateway " + cp.Self() + ")", nil
}

// ApplyProfile takes an alarm profile from the control plane (set through
// any gateway of the fleet, from names which) and puts it in force here as
// SetAlarmProfile does. A profile this store already holds as is changes
// nothing. A device this gateway has never seen has its profile stored and
// held: in force from the device's first connection here.
func (g *Gateway) ApplyProfile(pr controlplane.Profile, from string) error {
	have, err := g.db.Profiles()
	if err != nil {
		return err
	}
	if b, ok := have[pr.Device]; ok && bytes.Equal(b, pr.YAML) {
		return nil
	}
	ctx := context.WithValue(context.Background(), applyingKey{}, applying{actor: pr.Actor, from: from})
	_, err = g.SetAlarmProfile(ctx, &pb.SetAlarmProfileRequest{DeviceId: pr.Device, ProfileYaml: string(pr.YAML), Reason: pr.Reason})
	return err
}
