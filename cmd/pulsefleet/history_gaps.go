package main

import (
	"context"
	"fmt"
	"io"
	"sort"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// exitIncomplete is the exit status of a merged history query (episodes,
// audit, reviews, export --gateway) that answered without the history of a
// gateway that could not be read: the output holds what the others hold and
// says what is missing, and a script cannot take it for the whole answer.
const exitIncomplete = 3

// incompleteError is the error of such a query: main prints it and exits
// with exitIncomplete.
type incompleteError struct {
	what   string // "episodes", "audit entries", ...
	total  int
	failed []gatewayError
}

func (e incompleteError) Error() string {
	return "INCOMPLETE: " + gatewayFailures(e.what, e.total, e.failed).Error()
}

// incomplete is nil when no gateway failed, a plain failure (exit 1) when
// none could be read, else an incompleteError (exit 3).
func incomplete(what string, total int, failed []gatewayError) error {
	switch len(failed) {
	case 0:
		return nil
	case total:
		return gatewayFailures(what, total, failed)
	}
	return incompleteError{what: what, total: total, failed: failed}
}

// historyGaps says what a merged answer lacks: the gateways that could not
// be read and, as far as the reachable gateways' ledgers tell, the devices
// whose messages none of them holds (held by an unreachable gateway, or
// past ledger retention). A device numbers its data messages from 1 without
// holes, so a number missing below the highest one held is elsewhere. What
// the ledgers cannot tell: a device's messages after the last one the
// reachable gateways hold, and devices that only ever streamed to an
// unreachable gateway.
type historyGaps struct {
	Unreachable []unreachableGateway `json:"unreachable_gateways"`
	Devices     []deviceGap          `json:"devices_with_history_elsewhere"`
	// Reachable gateways whose ledger could not be read (the device list
	// lacks what they would have told).
	CoverageUnknown []string `json:"coverage_unknown,omitempty"`
}

type unreachableGateway struct {
	Gateway string `json:"gateway"`
	Error   string `json:"error"`
}

// deviceGap is one device's messages that no reachable gateway holds.
type deviceGap struct {
	Device  string   `json:"device"`
	Missing []seqGap `json:"missing"`
}

// seqGap is a run of missing sequence numbers between held ones.
type seqGap struct {
	FirstSequence uint64 `json:"first_sequence"`
	LastSequence  uint64 `json:"last_sequence"`
	// Device time of the last held message before the run (0 = none: the
	// run starts at the device's first message).
	AfterUnixMs int64 `json:"after_device_time_unix_ms,omitempty"`
	// Device time of the first held message after the run.
	BeforeUnixMs int64 `json:"before_device_time_unix_ms"`
}

// findGaps builds the gaps of a merged answer (nil when nothing failed):
// it reads the ledger coverage of the reachable gateways for devices (all
// when empty).
func findGaps(ctx context.Context, cf *clientFlags, reachable []string, failed []gatewayError, devices []string) *historyGaps {
	if len(failed) == 0 {
		return nil
	}
	g := &historyGaps{}
	for _, f := range failed {
		g.Unreachable = append(g.Unreachable, unreachableGateway{Gateway: f.Addr, Error: errorText(f.Err)})
	}
	spans := map[string][]store.SeqSpan{}
	for _, a := range reachable {
		cov, err := gatewayCoverage(ctx, cf, a, devices)
		if err != nil {
			g.CoverageUnknown = append(g.CoverageUnknown, a)
			continue
		}
		for _, c := range cov {
			for _, s := range c.GetSpans() {
				spans[c.GetDeviceId()] = append(spans[c.GetDeviceId()], store.SeqSpan{First: s.GetFirstSequence(), Last: s.GetLastSequence(),
					FirstDevMS: s.GetFirstDeviceTimeUnixMs(), LastDevMS: s.GetLastDeviceTimeUnixMs()})
			}
		}
	}
	g.Devices = missingSequences(spans)
	return g
}

// missingSequences lists, per device (ordered by id), the numbers below its
// highest held one that no span holds.
func missingSequences(spans map[string][]store.SeqSpan) []deviceGap {
	var out []deviceGap
	for id, ss := range spans {
		ss = store.MergeSpans(ss)
		var d deviceGap
		next, after := uint64(1), int64(0)
		for _, s := range ss {
			if s.First > next {
				d.Missing = append(d.Missing, seqGap{FirstSequence: next, LastSequence: s.First - 1, AfterUnixMs: after, BeforeUnixMs: s.FirstDevMS})
			}
			next, after = s.Last+1, s.LastDevMS
		}
		if len(d.Missing) > 0 {
			d.Device = id
			out = append(out, d)
		}
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Device < out[j].Device })
	return out
}

func gatewayCoverage(ctx context.Context, cf *clientFlags, addr string, devices []string) ([]*pb.LedgerCoverage, error) {
	conn, err := cf.dial(addr)
	if err != nil {
		return nil, err
	}
	defer conn.Close()
	cctx, cancel := context.WithTimeout(cf.ctx(ctx), 30*time.Second)
	defer cancel()
	resp, err := pb.NewFleetServiceClient(conn).ListLedgerCoverage(cctx, &pb.ListLedgerCoverageRequest{DeviceIds: devices})
	if err != nil {
		return nil, err
	}
	return resp.GetDevices(), nil
}

// notes are the gaps as lines of text, for the terminal and for comment
// lines and OperationOutcome issues in files; at most maxDevices devices
// are named one by one.
func (g *historyGaps) notes(what string, maxDevices int) []string {
	if g == nil {
		return nil
	}
	var out []string
	for _, u := range g.Unreachable {
		out = append(out, fmt.Sprintf("gateway %s could not be read (%s): the %s it holds are missing here", u.Gateway, u.Error, what))
	}
	if len(g.Devices) == 0 {
		out = append(out, "no device is known to have history there from the reachable gateways' ledgers (devices that only ever streamed to it are not known to them)")
	} else {
		var parts []string
		for i, d := range g.Devices {
			if i == maxDevices {
				parts = append(parts, fmt.Sprintf("and %d more", len(g.Devices)-i))
				break
			}
			parts = append(parts, d.Device+" ("+d.text()+")")
		}
		out = append(out, fmt.Sprintf("%d devices have messages that no reachable gateway holds, so their history may be incomplete: %s; devices that only ever streamed to an unreachable gateway are not known here",
			len(g.Devices), strings.Join(parts, ", ")))
	}
	if len(g.CoverageUnknown) > 0 {
		out = append(out, "the ledgers of "+strings.Join(g.CoverageUnknown, ", ")+" could not be read either, so the device list may be short")
	}
	return out
}

// text is a device's missing runs: "messages 1-120 (device time up to
// 2026-12-02T17:03:10Z)" or "... between T1 and T2".
func (d deviceGap) text() string {
	var parts []string
	for _, m := range d.Missing {
		seqs := fmt.Sprintf("messages %d-%d", m.FirstSequence, m.LastSequence)
		if m.FirstSequence == m.LastSequence {
			seqs = fmt.Sprintf("message %d", m.FirstSequence)
		}
		if m.AfterUnixMs == 0 {
			parts = append(parts, seqs+" before device time "+msTime(m.BeforeUnixMs))
		} else {
			parts = append(parts, seqs+" between device times "+msTime(m.AfterUnixMs)+" and "+msTime(m.BeforeUnixMs))
		}
	}
	return strings.Join(parts, "; ")
}

// printGaps writes the gaps to the terminal (stderr), one line each.
func printGaps(w io.Writer, cmd string, g *historyGaps, what string) {
	for _, n := range g.notes(what, 20) {
		fmt.Fprintf(w, "pulsefleet %s: INCOMPLETE: %s\n", cmd, safeText(n))
	}
}

// reachableOf is addrs without the failed ones.
func reachableOf(addrs []string, failed []gatewayError) []string {
	var out []string
	for _, a := range addrs {
		bad := false
		for _, f := range failed {
			bad = bad || f.Addr == a
		}
		if !bad {
			out = append(out, a)
		}
	}
	return out
}

// oneLine is s with line breaks as spaces (a note in a comment line).
func oneLine(s string) string { return strings.NewReplacer("\n", " ", "\r", " ").Replace(s) }

// writeCSVHead writes the caution comment line, then each note as a
// "# incomplete: NOTE" comment line.
func writeCSVHead(w io.Writer, notes []string) error {
	if err := caution.WriteComment(w); err != nil {
		return err
	}
	for _, n := range notes {
		if _, err := fmt.Fprintf(w, "# incomplete: %s\n", oneLine(n)); err != nil {
			return err
		}
	}
	return nil
}
