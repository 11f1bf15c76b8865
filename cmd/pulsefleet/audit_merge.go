package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"sort"
	"time"

	"google.golang.org/protobuf/encoding/protojson"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// gatewayAudit is one audit entry with the gateway whose log holds it.
type gatewayAudit struct {
	Gateway string
	Entry   *pb.AuditEntry
}

// runMergedAudit reads the audit logs of several gateways and merges them,
// newest first, at most limit entries. An entry in two logs (the same
// time, actor, action, device, remote and detail) is listed once. A
// gateway that cannot be read leaves the others' entries listed, marked
// incomplete (exit 3).
func runMergedAudit(ctx context.Context, cf *clientFlags, addrs []string, req *pb.ListAuditRequest, format string, s stdio) error {
	var all []gatewayAudit
	var failed []gatewayError
	for _, a := range addrs {
		es, err := gatewayAuditEntries(ctx, cf, a, req)
		if err != nil {
			failed = append(failed, gatewayError{a, err})
			continue
		}
		for _, e := range es {
			all = append(all, gatewayAudit{a, e})
		}
	}
	sort.SliceStable(all, func(i, j int) bool {
		if ti, tj := all[i].Entry.GetTimeUnixMs(), all[j].Entry.GetTimeUnixMs(); ti != tj {
			return ti > tj
		}
		return all[i].Gateway < all[j].Gateway
	})
	all, dups := dropDuplicateAudit(all)
	if len(all) > int(req.GetLimit()) {
		all = all[:req.GetLimit()]
	}
	gaps := findGaps(ctx, cf, reachableOf(addrs, failed), failed, nil)
	var err error
	if format == "json" {
		err = writeMergedAuditJSON(s.out, all, gaps, dups)
	} else {
		err = writeMergedAuditTable(s.out, all)
	}
	if err != nil {
		return err
	}
	if dups > 0 {
		fmt.Fprintf(s.err, "pulsefleet audit: %d entries held by two gateways are listed once\n", dups)
	}
	if gaps != nil {
		for _, u := range gaps.Unreachable {
			fmt.Fprintf(s.err, "pulsefleet audit: INCOMPLETE: gateway %s could not be read (%s): the audit entries it holds are missing here\n", u.Gateway, safeText(u.Error))
		}
	}
	return incomplete("audit entries", len(addrs), failed)
}

func gatewayAuditEntries(ctx context.Context, cf *clientFlags, addr string, req *pb.ListAuditRequest) ([]*pb.AuditEntry, error) {
	conn, err := cf.dial(addr)
	if err != nil {
		return nil, err
	}
	defer conn.Close()
	cctx, cancel := context.WithTimeout(cf.ctx(ctx), 30*time.Second)
	defer cancel()
	resp, err := pb.NewAdminServiceClient(conn).ListAudit(cctx, req)
	if err != nil {
		return nil, err
	}
	return resp.GetEntries(), nil
}

// dropDuplicateAudit keeps the first of entries alike in everything but
// their gateway and position in its log; it returns how many it dropped.
func dropDuplicateAudit(all []gatewayAudit) ([]gatewayAudit, int) {
	type key struct {
		t                                     int64
		actor, action, device, remote, detail string
	}
	seen := map[key]bool{}
	out := all[:0:0]
	for _, g := range all {
		e := g.Entry
		k := key{e.GetTimeUnixMs(), e.GetActor(), e.GetAction(), e.GetDeviceId(), e.GetRemote(), e.GetDetail()}
		if seen[k] {
			continue
		}
		seen[k] = true
		out = append(out, g)
	}
	return out, len(all) - len(out)
}

// writeMergedAuditJSON writes {"incomplete", "entries": [{"gateway",
// "entry"}], "duplicates_dropped", "gaps"}: with several gateways each entry
// needs its gateway (audit ids are per gateway).
func writeMergedAuditJSON(w io.Writer, all []gatewayAudit, gaps *historyGaps, dups int) error {
	type item struct {
		Gateway string          `json:"gateway"`
		Entry   json.RawMessage `json:"entry"`
	}
	out := struct {
		Caution    string       `json:"caution"`
		Incomplete bool         `json:"incomplete"`
		Entries    []item       `json:"entries"`
		Duplicates int          `json:"duplicates_dropped"`
		Gaps       *historyGaps `json:"gaps,omitempty"`
	}{Caution: caution.Text, Incomplete: gaps != nil, Entries: []item{}, Duplicates: dups, Gaps: gaps}
	for _, g := range all {
		b, err := protojson.Marshal(g.Entry)
		if err != nil {
			return err
		}
		out.Entries = append(out.Entries, item{g.Gateway, b})
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(out)
}

func writeMergedAuditTable(w io.Writer, all []gatewayAudit) error {
	t := newTable(w, 0, "GATEWAY", "TIME", "ACTOR", "ACTION", "DEVICE", "REMOTE", "DETAIL")
	for _, g := range all {
		e := g.Entry
		t.row(g.Gateway, fmtMS(e.GetTimeUnixMs()), e.GetActor(), e.GetAction(), orDash(e.GetDeviceId()), orDash(e.GetRemote()), e.GetDetail())
	}
	return t.flush()
}
