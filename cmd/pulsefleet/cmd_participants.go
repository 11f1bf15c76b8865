package main

import (
	"context"
	"encoding/csv"
	"flag"
	"fmt"
	"io"
	"strconv"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/participants"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "participants",
		summary: "Enrol devices to pseudonymous study participants on a running gateway; delete on withdrawal.\n\n" +
			"  pulsefleet participants enrol  --gateway ADDR --participant PID --device ID [--from T] [--to T] [--note TEXT]\n" +
			"  pulsefleet participants end    --gateway ADDR --participant PID [--device ID] [--to T]\n" +
			"  pulsefleet participants list   --gateway ADDR [--participant PID] [--device ID] [--format table|csv|json]\n" +
			"  pulsefleet participants delete --gateway ADDR --participant PID --confirm   (admin)\n\n" +
			"A participant id (PID) is a pseudonymous study code: 2..32 of A-Z 0-9 - _ with at least one digit\n" +
			"(P-0042). Never a name. A device belongs to at most one participant at any time; a participant may\n" +
			"hold several devices, one after another or at once (a prototype and a reference oximeter).\n" +
			"Intervals may lie in the past: data already stored then read as the participant's. enrol and end\n" +
			"need the operator role (a bedside task), delete the admin role; every change is audited.\n" +
			"delete removes the participant's trend points, raw captures, episodes and reviews inside the\n" +
			"enrolments, and the enrolments; see README \"Withdrawal\" for what it cannot reach (earlier\n" +
			"backups, Prometheus series).",
		run: runParticipants,
	})
}

func runParticipants(ctx context.Context, args []string, s stdio) error {
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" {
		fmt.Fprintln(s.err, commands["participants"].summary)
		if len(args) == 0 {
			return usagef("want a subcommand: enrol, end, list or delete")
		}
		return errHelp
	}
	sub, args := args[0], args[1:]
	var f participantsFlags
	fs := newFlagSet("participants "+sub, "--gateway ADDR [flags]", s.err)
	f.register(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	now := time.Now()
	optTime := func(flag, v string) (int64, error) {
		if v == "" {
			return 0, nil
		}
		t, err := parseTrendTime(flag, v, now)
		return t.UnixMilli(), err
	}
	from, err := optTime("--from", f.fromArg)
	if err != nil {
		return err
	}
	to, err := optTime("--to", f.toArg)
	if err != nil {
		return err
	}
	if sub != "list" {
		if err := participants.CheckID("--participant", f.pid); err != nil {
			return usagef("%v", err)
		}
	}
	addrs, err := f.cf.addrs()
	if err != nil {
		return err
	}
	conn, err := f.cf.dial(addrs[0])
	if err != nil {
		return err
	}
	defer conn.Close()
	cl := pb.NewParticipantServiceClient(conn)
	cctx, cancel := context.WithTimeout(f.cf.ctx(ctx), 5*time.Minute)
	defer cancel()
	return f.call(cctx, cl, sub, from, to, now, s.out)
}

// participantsFlags are the flags of 'participants'; each subcommand uses
// some of them.
type participantsFlags struct {
	cf                                        clientFlags
	pid, device, fromArg, toArg, note, format string
	confirm                                   bool
}

func (f *participantsFlags) register(fs *flag.FlagSet) {
	f.cf.register(fs)
	fs.StringVar(&f.pid, "participant", "", "participant id (pseudonymous study code, never a name)")
	fs.StringVar(&f.device, "device", "", "device id")
	fs.StringVar(&f.fromArg, "from", "", "enrol: start, RFC 3339, Unix seconds or a duration before now (default now)")
	fs.StringVar(&f.toArg, "to", "", "enrol: end (default open); end: end time (default now)")
	fs.StringVar(&f.note, "note", "", "enrol: free text, at most 200 bytes (never a name)")
	fs.StringVar(&f.format, "format", "table", "list: table, csv or json")
	fs.BoolVar(&f.confirm, "confirm", false, "delete: required; deletion cannot be undone")
}

// call sends subcommand sub's request and prints the answer.
func (f *participantsFlags) call(cctx context.Context, cl pb.ParticipantServiceClient, sub string, from, to int64, now time.Time, out io.Writer) error {
	switch sub {
	case "enrol":
		if f.device == "" {
			return usagef("--device: required")
		}
		if from == 0 {
			from = now.UnixMilli()
		}
		resp, err := cl.Enrol(cctx, &pb.EnrolRequest{Enrolment: &pb.Enrolment{ParticipantId: f.pid, DeviceId: f.device,
			FromUnixMs: from, ToUnixMs: to, Note: f.note}})
		if err != nil {
			return err
		}
		fmt.Fprintf(out, "enrolled %s\n", enrolmentLine(resp.GetEnrolment()))
	case "end":
		resp, err := cl.EndEnrolment(cctx, &pb.EndEnrolmentRequest{ParticipantId: f.pid, DeviceId: f.device, ToUnixMs: to})
		if err != nil {
			return err
		}
		fmt.Fprintf(out, "ended %s\n", enrolmentLine(resp.GetEnrolment()))
	case "list":
		resp, err := cl.ListEnrolments(cctx, &pb.ListEnrolmentsRequest{ParticipantId: f.pid, DeviceId: f.device})
		if err != nil {
			return err
		}
		return writeEnrolments(out, f.format, resp.GetEnrolments())
	case "delete":
		if !f.confirm {
			return usagef("--confirm: required; delete removes %s's trend points, raw captures, episodes and reviews for good", f.pid)
		}
		resp, err := cl.DeleteParticipant(cctx, &pb.DeleteParticipantRequest{ParticipantId: f.pid, Confirm: true})
		if err != nil {
			return err
		}
		fmt.Fprintf(out, "deleted participant %s: %d trend points, %d raw captures, %d episodes, %d reviews in %d enrolments (audit entry %d)\n",
			f.pid, resp.GetTrendPoints(), resp.GetRawCaptures(), resp.GetEpisodes(), resp.GetReviews(), len(resp.GetEnrolments()), resp.GetAuditId())
		for _, e := range resp.GetEnrolments() {
			fmt.Fprintf(out, "  %s\n", enrolmentLine(e))
		}
	default:
		return usagef("unknown subcommand %q, want enrol, end, list or delete", sub)
	}
	return nil
}

func fmtUnixMS(ms int64) string {
	if ms == 0 {
		return "open"
	}
	return time.UnixMilli(ms).UTC().Format(time.RFC3339)
}

func enrolmentLine(e *pb.Enrolment) string {
	return fmt.Sprintf("%s on %s from %s to %s (enrolment %d)", e.GetParticipantId(), e.GetDeviceId(),
		fmtUnixMS(e.GetFromUnixMs()), fmtUnixMS(e.GetToUnixMs()), e.GetEnrolmentId())
}

func writeEnrolments(w io.Writer, format string, es []*pb.Enrolment) error {
	switch format {
	case "json":
		return writeProtoJSON(w, es)
	case "csv":
		cw := csv.NewWriter(w)
		cw.Write([]string{"participant", "device", "from", "to", "note", "enrolment_id", "created", "created_by"})
		for _, e := range es {
			to := ""
			if e.GetToUnixMs() != 0 {
				to = fmtUnixMS(e.GetToUnixMs())
			}
			cw.Write([]string{e.GetParticipantId(), e.GetDeviceId(), fmtUnixMS(e.GetFromUnixMs()), to, e.GetNote(),
				strconv.FormatUint(e.GetEnrolmentId(), 10), fmtUnixMS(e.GetCreatedUnixMs()), e.GetCreatedBy()})
		}
		cw.Flush()
		return cw.Error()
	case "table":
		tw := newTable(w, 0, "PARTICIPANT", "DEVICE", "FROM", "TO", "NOTE")
		for _, e := range es {
			tw.row(e.GetParticipantId(), e.GetDeviceId(), fmtUnixMS(e.GetFromUnixMs()), fmtUnixMS(e.GetToUnixMs()), e.GetNote())
		}
		return tw.flush()
	}
	return usagef("--format: %q, want table, csv or json", format)
}

// remoteEnrolments lists every gateway's enrolments (a sharded fleet may
// hold them on several), one copy of each.
func remoteEnrolments(ctx context.Context, cf *clientFlags, addrs []string) ([]participants.Interval, error) {
	var out []participants.Interval
	seen := map[participants.Interval]bool{}
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			return nil, err
		}
		cctx, cancel := context.WithTimeout(cf.ctx(ctx), time.Minute)
		resp, err := pb.NewParticipantServiceClient(conn).ListEnrolments(cctx, &pb.ListEnrolmentsRequest{})
		cancel()
		conn.Close()
		if err != nil {
			return nil, fmt.Errorf("gateway %s: enrolments: %w", a, err)
		}
		for _, e := range resp.GetEnrolments() {
			iv := participants.Interval{Participant: e.GetParticipantId(), Device: e.GetDeviceId(), FromMS: e.GetFromUnixMs(), ToMS: e.GetToUnixMs()}
			if !seen[iv] {
				seen[iv] = true
				out = append(out, iv)
			}
		}
	}
	return out, nil
}
