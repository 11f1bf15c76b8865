package auth

import (
	"crypto/rand"
	"crypto/sha256"
	"encoding/base64"
	"encoding/hex"
	"errors"
	"fmt"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/ids"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// TokenSpec names the subject of a new credential: exactly one of Device or
// Operator; Role for operators only.
type TokenSpec struct {
	Device   string // device id (1..64 of A-Z a-z 0-9 . _ -)
	Operator string // operator name (same characters)
	Role     Role   // viewer, operator or admin; RoleNone for a device
}

// Validate names the first field of s that is wrong.
func (s TokenSpec) Validate() error {
	switch {
	case (s.Device == "") == (s.Operator == ""):
		return errors.New("device, operator: give exactly one")
	case s.Device != "":
		if err := ids.Check("device", s.Device); err != nil {
			return err
		}
		if s.Role != RoleNone {
			return fmt.Errorf("role: %s, but a device credential has no role (it may only stream as its device)", s.Role)
		}
	default:
		if err := ids.Check("operator", s.Operator); err != nil {
			return err
		}
		if s.Role < RoleViewer || s.Role > RoleAdmin {
			return errors.New("role: missing, want viewer, operator or admin")
		}
	}
	return nil
}

// HashSecret is the stored form of a token: hex SHA-256.
func HashSecret(secret string) string {
	h := sha256.Sum256([]byte(secret))
	return hex.EncodeToString(h[:])
}

// newSecret makes a bearer token: "pf1_" + a 12-hex-digit public id + "_" +
// 256 random bits (base64url). Only its SHA-256 is stored.
func newSecret() (secret, id string) {
	var idb [6]byte
	var sb [32]byte
	_, _ = rand.Read(idb[:]) // crypto/rand.Read never fails (Go 1.24+)
	_, _ = rand.Read(sb[:])
	id = hex.EncodeToString(idb[:])
	return "pf1_" + id + "_" + base64.RawURLEncoding.EncodeToString(sb[:]), id
}

// IssueToken creates a credential in db and returns its secret, which is
// shown this once. by and remote name the issuer for the audit log. The
// store must not be held by a running gateway (use AdminService.IssueToken
// then).
func IssueToken(db *store.DB, spec TokenSpec, by, remote string, now time.Time) (string, store.Token, error) {
	secret, t, audit, err := NewToken(spec, by, remote, now)
	if err != nil {
		return "", store.Token{}, err
	}
	if err := db.PutToken(t, audit); err != nil {
		return "", store.Token{}, fmt.Errorf("issue token: %w", err)
	}
	return secret, t, nil
}

// NewToken makes a credential and its audit entry without storing them
// (a gateway in a fleet publishes it to the shared control plane first).
func NewToken(spec TokenSpec, by, remote string, now time.Time) (string, store.Token, *store.AuditEntry, error) {
	if err := spec.Validate(); err != nil {
		return "", store.Token{}, nil, err
	}
	secret, id := newSecret()
	t := store.Token{Hash: HashSecret(secret), ID: id, CreatedMS: now.UnixMilli(), IssuedBy: by}
	detail := ""
	if spec.Device != "" {
		t.Kind, t.Subject = "device", spec.Device
		detail = "device credential " + id + " for " + spec.Device
	} else {
		t.Kind, t.Subject, t.Role = "operator", spec.Operator, spec.Role.String()
		detail = "operator credential " + id + " for " + spec.Operator + " with role " + t.Role
	}
	audit := &store.AuditEntry{TimeMS: t.CreatedMS, Actor: by, Action: "token.issue", Device: spec.Device, Detail: detail, Remote: remote}
	return secret, t, audit, nil
}

// RevokeToken revokes the credential with public id in db at once.
func RevokeToken(db *store.DB, id, by, remote string, now time.Time) (store.Token, error) {
	if id == "" || len(id) > 64 {
		return store.Token{}, fmt.Errorf("token id: %q, want the id shown by `token list`", id)
	}
	ms := now.UnixMilli()
	t, err := db.RevokeToken(id, ms, &store.AuditEntry{TimeMS: ms, Actor: by, Action: "token.revoke", Detail: "credential " + id, Remote: remote})
	if err != nil {
		return store.Token{}, err
	}
	return t, nil
}

// TokenProto maps a stored credential to the API's (never with its secret).
func TokenProto(t store.Token) *pb.Token {
	out := &pb.Token{TokenId: t.ID, Kind: t.Kind, Subject: t.Subject, CreatedUnixMs: t.CreatedMS, RevokedUnixMs: t.RevokedMS, IssuedBy: t.IssuedBy}
	if r, err := ParseRole(t.Role); err == nil {
		out.Role = RoleProto(r)
	}
	return out
}

// AuditProto maps a stored audit entry to the API's.
func AuditProto(e store.AuditEntry) *pb.AuditEntry {
	return &pb.AuditEntry{AuditId: e.ID, TimeUnixMs: e.TimeMS, Actor: e.Actor, Action: e.Action, DeviceId: e.Device, Detail: e.Detail, Remote: e.Remote}
}
