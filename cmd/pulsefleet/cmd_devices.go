package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"sort"
	"strings"
	"time"

	"google.golang.org/protobuf/encoding/protojson"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/attention"
	"github.com/pulsefleet/pulsefleet/internal/participants"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name:    "devices",
		summary: "List the devices of one or more running gateways with their live status and the study participant enrolled to each now.",
		run:     runDevices,
	})
}

func runDevices(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("devices", "--gateway ADDR[,ADDR...] [--format table|json]", s.err)
	cf.register(fs)
	format := fs.String("format", "table", "output: table or json")
	stale := fs.Duration("stale", 10*time.Second, "a value older than this, or of an offline device, is not shown as current: the table prints - and its age (the web page: ?stale=S)")
	order := fs.String("order", "attention", "row order: attention (alarms by priority, longest announced first; then technical problems; then the rest) or id")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *stale <= 0 {
		return usagef("--stale %v, want more than 0", *stale)
	}
	if *order != "attention" && *order != "id" {
		return usagef("--order: %q, want attention or id", *order)
	}
	if *format != "table" && *format != "json" {
		return usagef("--format: %q, want table or json", *format)
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	devs, err := listDevices(ctx, &cf, addrs)
	if err != nil {
		return err
	}
	now := time.Now()
	if *order == "attention" {
		announced, err := announcedSince(ctx, &cf, addrs)
		if err != nil {
			return err
		}
		orderByAttention(devs, announced, now, *stale)
	}
	ivs, err := remoteEnrolments(ctx, &cf, addrs)
	if err != nil {
		return err
	}
	holders := map[string]string{}
	for _, d := range devs {
		holders[d.GetDeviceId()] = participants.Holder(ivs, d.GetDeviceId(), now.UnixMilli())
	}
	if *format == "json" {
		return writeDevicesJSON(s.out, devs, holders)
	}
	return writeDevicesTable(s.out, devs, holders, now, *stale)
}

// writeDevicesJSON prints the devices as protojson Device objects, each
// with "participant" (the participant enrolled to it now) added when it has
// one. Device has no field of that name, so the key cannot collide.
func writeDevicesJSON(w io.Writer, devs []*pb.Device, holders map[string]string) error {
	arr := make([]json.RawMessage, 0, len(devs))
	for _, d := range devs {
		b, err := protojson.Marshal(d)
		if err != nil {
			return err
		}
		if pid := holders[d.GetDeviceId()]; pid != "" {
			q, _ := json.Marshal(pid)
			b = bytes.TrimSuffix(bytes.TrimSpace(b), []byte("}"))
			if len(bytes.TrimSpace(b)) > 1 {
				b = append(b, ',')
			}
			b = append(append(append(b, `"participant":`...), q...), '}')
		}
		arr = append(arr, b)
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(arr)
}

// listDevices asks every gateway and merges; a device reported by several
// (during a reshard) is kept from the one where it is connected, else the
// most recently seen.
func listDevices(ctx context.Context, cf *clientFlags, addrs []string) ([]*pb.Device, error) {
	byID := map[string]*pb.Device{}
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			return nil, err
		}
		cctx, cancel := context.WithTimeout(cf.ctx(ctx), 15*time.Second)
		resp, err := pb.NewFleetServiceClient(conn).ListDevices(cctx, &pb.ListDevicesRequest{})
		cancel()
		conn.Close()
		if err != nil {
			return nil, fmt.Errorf("gateway %s: %w", a, err)
		}
		for _, d := range resp.GetDevices() {
			old, ok := byID[d.GetDeviceId()]
			if !ok || fresher(d, old) {
				byID[d.GetDeviceId()] = d
			}
		}
	}
	out := make([]*pb.Device, 0, len(byID))
	for _, d := range byID {
		out = append(out, d)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].GetDeviceId() < out[j].GetDeviceId() })
	return out, nil
}

// fresher reports whether gateway's view d of a device is to be shown
// rather than old: the gateway it streams to, then one that did not see it
// move away (a fleet on etcd), then the latest seen.
func fresher(d, old *pb.Device) bool {
	if d.GetConnected() != old.GetConnected() {
		return d.GetConnected()
	}
	if dm, om := d.GetMovedToGateway() != "", old.GetMovedToGateway() != ""; dm != om {
		return om
	}
	return d.GetLastSeenUnixMs() > old.GetLastSeenUnixMs()
}

func fmtOpt(v *float64, prec int) string {
	if v == nil {
		return "-"
	}
	return fmt.Sprintf("%.*f", prec, *v)
}

// writeDevicesTable prints the devices; holders maps a device to the
// participant enrolled to it now ("-" when none).
func writeDevicesTable(w io.Writer, devs []*pb.Device, holders map[string]string, now time.Time, stale time.Duration) error {
	t := newTable(w, 0, "DEVICE", "PARTICIPANT", "STATE", "MODE", "LAST SEEN", "SpO2 %", "PULSE /min", "PI %", "SQI", "VALUES", "ALARM", "CONDITIONS", "LABELS")
	for _, d := range devs {
		state := "offline"
		switch {
		case d.GetConnected():
			state = "connected"
		case d.GetMovedToGateway() != "":
			state = "moved to " + d.GetMovedToGateway() // its alarms are evaluated there
		}
		seen := "never"
		if ms := d.GetLastSeenUnixMs(); ms > 0 {
			seen = now.Sub(time.UnixMilli(ms)).Round(time.Second).String() + " ago"
		}
		l := d.GetLatest()
		age := "-"
		switch {
		case l == nil:
			l = &pb.TrendPoint{}
		case valueStale(d, now, stale):
			// Never show an old value as current: "-" and its age.
			age = "stale, " + now.Sub(time.UnixMilli(l.GetTimeUnixMs())).Round(time.Second).String() + " old"
			l = &pb.TrendPoint{}
		default:
			age = "current"
		}
		alarm := strings.TrimPrefix(strings.ToLower(d.GetAlarmPriority().String()), "priority_")
		if alarm == "unspecified" {
			alarm = "-"
		}
		var labels []string
		for k, v := range d.GetLabels() {
			labels = append(labels, k+"="+v)
		}
		sort.Strings(labels)
		mode := strings.TrimPrefix(strings.ToLower(d.GetMode().String()), "mode_")
		pid := holders[d.GetDeviceId()]
		if pid == "" {
			pid = "-"
		}
		t.row(d.GetDeviceId(), pid, state, mode, seen,
			fmtOpt(l.Spo2Pct, 1), fmtOpt(l.PulseBpm, 0), fmtOpt(l.PiPct, 2), fmtOpt(l.Sqi, 2), age, alarm,
			conditionLabels(d.GetActiveConditions()), strings.Join(labels, " "))
	}
	return t.flush()
}

// conditionLabels joins the readable labels of conditions (alarms.Label).
func conditionLabels(cs []string) string {
	if len(cs) == 0 {
		return "-"
	}
	out := make([]string, len(cs))
	for i, c := range cs {
		out[i] = alarms.Label(c)
	}
	return strings.Join(out, ", ")
}

// valueStale reports whether a device's latest point must not be shown as
// current (attention.Stale: offline, no value, or older than stale), the
// rule the web page follows too.
func valueStale(d *pb.Device, now time.Time, stale time.Duration) bool {
	return attention.Stale(d, now, stale)
}

// announcedSince returns, per device, when its earliest open alarm episode
// was announced, from every gateway's active episodes.
func announcedSince(ctx context.Context, cf *clientFlags, addrs []string) (map[string]int64, error) {
	out := map[string]int64{}
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			return nil, err
		}
		cctx, cancel := context.WithTimeout(cf.ctx(ctx), 15*time.Second)
		resp, err := pb.NewFleetServiceClient(conn).ListEpisodes(cctx, &pb.ListEpisodesRequest{ActiveOnly: true})
		cancel()
		conn.Close()
		if err != nil {
			return nil, fmt.Errorf("gateway %s: %w", a, err)
		}
		attention.Announced(resp.GetEpisodes(), out)
	}
	return out, nil
}

// orderByAttention sorts devices by what needs attention (internal/attention,
// the order of the web page's overview too).
func orderByAttention(devs []*pb.Device, announced map[string]int64, now time.Time, stale time.Duration) {
	attention.Order(devs, announced, now, stale)
}
