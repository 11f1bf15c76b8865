package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/user"
	"strings"
	"time"

	"google.golang.org/grpc"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

const tokenSummary = `Manage credentials: bearer tokens for devices and operators.

  pulsefleet token issue  (--data DIR | --gateway ADDR) --device ID
  pulsefleet token issue  (--data DIR | --gateway ADDR) --operator NAME --role viewer|operator|admin
  pulsefleet token list   (--data DIR | --gateway ADDR) [--format table|json]
  pulsefleet token revoke (--data DIR | --gateway ADDR) --id TOKEN_ID

issue prints the new token once on stdout; only its SHA-256 is stored, so it
cannot be shown again (issue a new one and revoke the old). A device token
lets one device stream as itself; an operator token carries a role:
viewer reads everything, operator also acknowledges and pauses alarms, admin
also changes alarm profiles and calibrations, manages credentials and may
stream as any device (simulators, load tests).

Clients send the token as gRPC metadata "authorization: Bearer TOKEN"; the
web page asks for an operator token at /login. Once any token exists in the
store, the gateway requires one on every call (health checks and reflection
excepted); with none, a plaintext gateway on loopback runs open for
development. Every refused call, issue and revocation goes to the audit log
(see 'pulsefleet audit').

--data DIR works on a stopped gateway's store (bbolt locks the file while a
gateway runs). With the gateway running, give --gateway ADDR and an admin
token (--token or $PULSEFLEET_TOKEN). The first admin token of a fresh
installation is issued with --data before 'serve' (or, on a development
gateway that runs open, through --gateway from loopback).

In a sharded fleet each gateway has its own store: issue a device's token on
the gateway that owns it, an operator's on each.`

func init() {
	register(command{name: "token", summary: tokenSummary, run: runToken})
}

// adminAPI is what the token and audit commands need: the gateway's
// AdminService, or the same operations on a local store.
type adminAPI interface {
	IssueToken(ctx context.Context, in *pb.IssueTokenRequest, opts ...grpc.CallOption) (*pb.IssueTokenResponse, error)
	ListTokens(ctx context.Context, in *pb.ListTokensRequest, opts ...grpc.CallOption) (*pb.ListTokensResponse, error)
	RevokeToken(ctx context.Context, in *pb.RevokeTokenRequest, opts ...grpc.CallOption) (*pb.RevokeTokenResponse, error)
	ListAudit(ctx context.Context, in *pb.ListAuditRequest, opts ...grpc.CallOption) (*pb.ListAuditResponse, error)
}

// adminFlags choose the store (--data) or a running gateway (--gateway).
type adminFlags struct {
	data string
	wait time.Duration
	cf   clientFlags
}

func (a *adminFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&a.data, "data", "", "data directory of a stopped gateway")
	fs.DurationVar(&a.wait, "wait", time.Second, "with --data: how long to wait for the store's lock")
	a.cf.register(fs)
}

// open connects to the chosen backend; close releases it.
func (a *adminFlags) open(ctx context.Context, write bool) (api adminAPI, cctx context.Context, close func() error, err error) {
	switch {
	case a.data != "" && a.cf.gateways != "":
		return nil, nil, nil, usagef("--data, --gateway: give one (--data for a stopped gateway's store, --gateway for a running one)")
	case a.data != "":
		db, err := store.Open(a.data, store.Options{ReadOnly: !write, Timeout: a.wait})
		if errors.Is(err, store.ErrLocked) {
			return nil, nil, nil, fmt.Errorf("%w: the gateway holds %s; use --gateway ADDR with an admin token instead of --data", err, a.data)
		}
		if err != nil {
			return nil, nil, nil, err
		}
		return &localAdmin{db: db, actor: localActor()}, ctx, db.Close, nil
	case a.cf.gateways != "":
		addrs, err := a.cf.addrs()
		if err != nil {
			return nil, nil, nil, err
		}
		if len(addrs) != 1 {
			return nil, nil, nil, usagef("--gateway: one address, got %d (each gateway of a sharded fleet has its own store)", len(addrs))
		}
		conn, err := a.cf.dial(addrs[0])
		if err != nil {
			return nil, nil, nil, err
		}
		return pb.NewAdminServiceClient(conn), a.cf.ctx(ctx), conn.Close, nil
	}
	return nil, nil, nil, usagef("--data DIR or --gateway ADDR: required")
}

// localActor names whoever runs the command on this machine, for the audit log.
func localActor() string {
	name := os.Getenv("USER")
	if u, err := user.Current(); err == nil && u.Username != "" {
		name = u.Username
	}
	if name == "" {
		name = "unknown"
	}
	return "local:" + name
}

// localAdmin performs AdminService's credential and audit operations on an
// open store (no gateway running).
type localAdmin struct {
	db    *store.DB
	actor string
}

func (l *localAdmin) IssueToken(_ context.Context, in *pb.IssueTokenRequest, _ ...grpc.CallOption) (*pb.IssueTokenResponse, error) {
	spec := auth.TokenSpec{Device: in.GetDeviceId(), Operator: in.GetOperator(), Role: auth.RoleFromProto(in.GetRole())}
	secret, t, err := auth.IssueToken(l.db, spec, l.actor, "local", time.Now())
	if err != nil {
		return nil, err
	}
	return &pb.IssueTokenResponse{Secret: secret, Token: auth.TokenProto(t)}, nil
}

func (l *localAdmin) ListTokens(context.Context, *pb.ListTokensRequest, ...grpc.CallOption) (*pb.ListTokensResponse, error) {
	ts, err := l.db.Tokens()
	if err != nil {
		return nil, err
	}
	out := &pb.ListTokensResponse{}
	for _, t := range ts {
		out.Tokens = append(out.Tokens, auth.TokenProto(t))
	}
	return out, nil
}

func (l *localAdmin) RevokeToken(_ context.Context, in *pb.RevokeTokenRequest, _ ...grpc.CallOption) (*pb.RevokeTokenResponse, error) {
	t, err := auth.RevokeToken(l.db, in.GetTokenId(), l.actor, "local", time.Now())
	if errors.Is(err, store.ErrNotFound) {
		return nil, fmt.Errorf("--id: %q is not a credential in this store (see 'pulsefleet token list')", in.GetTokenId())
	}
	if err != nil {
		return nil, err
	}
	return &pb.RevokeTokenResponse{Token: auth.TokenProto(t)}, nil
}

func (l *localAdmin) ListAudit(_ context.Context, in *pb.ListAuditRequest, _ ...grpc.CallOption) (*pb.ListAuditResponse, error) {
	es, err := l.db.Audit(in.GetFromUnixMs(), in.GetActionPrefix(), int(in.GetLimit()))
	if err != nil {
		return nil, err
	}
	out := &pb.ListAuditResponse{}
	for _, e := range es {
		out.Entries = append(out.Entries, auth.AuditProto(e))
	}
	return out, nil
}

func runToken(ctx context.Context, args []string, s stdio) error {
	if len(args) == 0 {
		return usagef("token: want a subcommand: issue, list or revoke")
	}
	sub, args := args[0], args[1:]
	switch sub {
	case "-h", "--help", "help":
		fs := newFlagSet("token", "issue|list|revoke [flags]", s.err)
		fs.Usage()
		return errHelp
	case "issue":
		return runTokenIssue(ctx, args, s)
	case "list":
		return runTokenList(ctx, args, s)
	case "revoke":
		return runTokenRevoke(ctx, args, s)
	}
	return usagef("token: unknown subcommand %q, want issue, list or revoke", sub)
}

// runTokenIssue is 'token issue': it prints the new secret once.
func runTokenIssue(ctx context.Context, args []string, s stdio) error {
	var af adminFlags
	var device, operator, role string
	fs := newFlagSet("token", "issue (--data DIR | --gateway ADDR --token ADMIN) (--device ID | --operator NAME --role ROLE)", s.err)
	af.register(fs)
	fs.StringVar(&device, "device", "", "device id: a token that lets this device stream as itself")
	fs.StringVar(&operator, "operator", "", "operator name (1..64 of A-Z a-z 0-9 . _ -): a token with --role")
	fs.StringVar(&role, "role", "", "operator role: viewer, operator or admin")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	req := &pb.IssueTokenRequest{DeviceId: device, Operator: operator}
	switch {
	case (device == "") == (operator == ""):
		return usagef("--device, --operator: give exactly one")
	case device != "" && role != "":
		return usagef("--role: only with --operator (a device token may only stream)")
	case operator != "":
		r, err := auth.ParseRole(role)
		if err != nil {
			return usagef("--role: %q, want viewer, operator or admin", role)
		}
		req.Role = auth.RoleProto(r)
	}
	api, cctx, closeFn, err := af.open(ctx, true)
	if err != nil {
		return err
	}
	defer closeFn()
	resp, err := api.IssueToken(cctx, req)
	if err != nil {
		return fmt.Errorf("issue: %w", err)
	}
	t := resp.GetToken()
	fmt.Fprintln(s.out, resp.GetSecret())
	what := "device " + t.GetSubject()
	if t.GetKind() == "operator" {
		what = "operator " + t.GetSubject() + " (" + roleName(t.GetRole()) + ")"
	}
	fmt.Fprintf(s.err, "issued credential %s for %s. The token above is shown only this once: store it now.\n", t.GetTokenId(), what)
	return nil
}

// runTokenList is 'token list'.
func runTokenList(ctx context.Context, args []string, s stdio) error {
	var af adminFlags
	var format string
	fs := newFlagSet("token", "list (--data DIR | --gateway ADDR --token ADMIN) [--format table|json]", s.err)
	af.register(fs)
	fs.StringVar(&format, "format", "table", "output: table or json")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if format != "table" && format != "json" {
		return usagef("--format: %q, want table or json", format)
	}
	api, cctx, closeFn, err := af.open(ctx, false)
	if err != nil {
		return err
	}
	defer closeFn()
	resp, err := api.ListTokens(cctx, &pb.ListTokensRequest{})
	if err != nil {
		return fmt.Errorf("list: %w", err)
	}
	if format == "json" {
		return writeProtoJSON(s.out, resp.GetTokens())
	}
	return writeTokensTable(s.out, resp.GetTokens())
}

// runTokenRevoke is 'token revoke'.
func runTokenRevoke(ctx context.Context, args []string, s stdio) error {
	var af adminFlags
	var id string
	fs := newFlagSet("token", "revoke (--data DIR | --gateway ADDR --token ADMIN) --id TOKEN_ID", s.err)
	af.register(fs)
	fs.StringVar(&id, "id", "", "the credential's id, as 'token list' shows it (required)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if id == "" {
		return usagef("--id: required (see 'pulsefleet token list')")
	}
	api, cctx, closeFn, err := af.open(ctx, true)
	if err != nil {
		return err
	}
	defer closeFn()
	resp, err := api.RevokeToken(cctx, &pb.RevokeTokenRequest{TokenId: id})
	if err != nil {
		return fmt.Errorf("revoke: %w", err)
	}
	fmt.Fprintf(s.out, "revoked %s (%s %s)\n", resp.GetToken().GetTokenId(), resp.GetToken().GetKind(), resp.GetToken().GetSubject())
	return nil
}

func roleName(r pb.Role) string {
	if r == pb.Role_ROLE_UNSPECIFIED {
		return "-"
	}
	return strings.TrimPrefix(strings.ToLower(r.String()), "role_")
}

func fmtMS(ms int64) string {
	if ms == 0 {
		return "-"
	}
	return time.UnixMilli(ms).UTC().Format(time.RFC3339)
}

func writeTokensTable(w io.Writer, ts []*pb.Token) error {
	tb := newTable(w, 0, "ID", "KIND", "SUBJECT", "ROLE", "CREATED", "REVOKED", "ISSUED BY")
	for _, t := range ts {
		tb.row(t.GetTokenId(), t.GetKind(), t.GetSubject(), roleName(t.GetRole()),
			fmtMS(t.GetCreatedUnixMs()), fmtMS(t.GetRevokedUnixMs()), t.GetIssuedBy())
	}
	return tb.flush()
}
