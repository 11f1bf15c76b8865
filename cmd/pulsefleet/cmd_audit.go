package main

import (
	"context"
	"fmt"
	"io"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

const auditSummary = `Read the audit log, newest first.

The log holds every authentication failure (auth.failure: no, unknown or
revoked credential; auth.denied: a valid credential without the right; at most
10 per remote host and 100 in all per minute, the next entry counting those
left out), web
login (auth.login), alarm acknowledgement and pause (alarm.acknowledged,
alarm.paused, alarm.resumed), profile change (profile.set), calibration change
(calibration.put, calibration.assign), credential change (token.issue,
token.revoke), stream replacement (stream.replace) and, in a fleet on etcd,
device retirement (device.retire) and messages dropped after a restart because
another gateway holds them (fleet.resent_dropped): who, when, what, from
where.

--since T: RFC 3339 (2026-11-30T22:00:00Z), Unix seconds, or a duration
meaning that long ago (24h). --action PREFIX keeps actions that start with it
(auth. for every refusal).

--data DIR reads a stopped gateway's store; with the gateway running give
--gateway ADDR and a token (--token or $PULSEFLEET_TOKEN; the viewer role
suffices).

--gateway A,B,... merges the logs of several gateways (each keeps its own),
newest first, with a GATEWAY column (JSON: an object with "entries", each
{"gateway", "entry"}); an entry held by two gateways is listed once. A
gateway that cannot be read leaves the others' entries listed: the output
says INCOMPLETE and names it (JSON: "incomplete": true and "gaps"), and the
command exits 3.`

func init() {
	register(command{name: "audit", summary: auditSummary, run: runAudit})
}

func runAudit(ctx context.Context, args []string, s stdio) error {
	var af adminFlags
	var since, action, format string
	var limit int
	fs := newFlagSet("audit", "[--data DIR | --gateway ADDR[,ADDR...] --token T] [--since T] [--action PREFIX] [--limit N] [--format table|json]", s.err)
	af.register(fs)
	fs.StringVar(&since, "since", "", "only entries at or after T: RFC 3339, Unix seconds, or a duration ago such as 24h (default: all)")
	fs.StringVar(&action, "action", "", "only actions starting with PREFIX, e.g. auth. or alarm.")
	fs.IntVar(&limit, "limit", 1000, "at most this many entries, 1..10000")
	fs.StringVar(&format, "format", "table", "output: table or json")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if limit < 1 || limit > 10000 {
		return usagef("--limit: %d, want 1..10000", limit)
	}
	if format != "table" && format != "json" {
		return usagef("--format: %q, want table or json", format)
	}
	fromMS, err := parseSince(since, time.Now())
	if err != nil {
		return err
	}
	if af.data == "" && af.cf.gateways != "" {
		addrs, err := af.cf.addrs()
		if err != nil {
			return err
		}
		if len(addrs) > 1 {
			return runMergedAudit(ctx, &af.cf, addrs, &pb.ListAuditRequest{FromUnixMs: fromMS, ActionPrefix: action, Limit: uint32(limit)}, format, s)
		}
	}
	api, cctx, closeFn, err := af.open(ctx, false)
	if err != nil {
		return err
	}
	defer closeFn()
	resp, err := api.ListAudit(cctx, &pb.ListAuditRequest{FromUnixMs: fromMS, ActionPrefix: action, Limit: uint32(limit)})
	if err != nil {
		return fmt.Errorf("audit: %w", err)
	}
	if format == "json" {
		return writeProtoJSON(s.out, resp.GetEntries())
	}
	return writeAuditTable(s.out, resp.GetEntries())
}

// parseSince reads --since: a duration ago, RFC 3339 or Unix seconds.
func parseSince(v string, now time.Time) (int64, error) {
	if v == "" {
		return 0, nil
	}
	if d, err := time.ParseDuration(v); err == nil {
		if d < 0 {
			return 0, usagef("--since %q: a duration must be positive (that long ago)", v)
		}
		return now.Add(-d).UnixMilli(), nil
	}
	ms, err := parseExportTime("--since", v)
	if err != nil {
		return 0, usagef("--since %q, want RFC 3339 (2026-11-30T22:00:00Z), Unix seconds (1796076000) or a duration ago (24h)", v)
	}
	return ms, nil
}

func writeAuditTable(w io.Writer, es []*pb.AuditEntry) error {
	t := newTable(w, 0, "TIME", "ACTOR", "ACTION", "DEVICE", "REMOTE", "DETAIL")
	for _, e := range es {
		dev, remote := e.GetDeviceId(), e.GetRemote()
		if dev == "" {
			dev = "-"
		}
		if remote == "" {
			remote = "-"
		}
		t.row(fmtMS(e.GetTimeUnixMs()), e.GetActor(), e.GetAction(), dev, remote, e.GetDetail())
	}
	return t.flush()
}
