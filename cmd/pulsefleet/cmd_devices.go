package main

import (
	"context"
	"fmt"
	"io"
	"sort"
	"strings"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name:    "devices",
		summary: "List the devices of one or more running gateways with their live status.",
		run:     runDevices,
	})
}

func runDevices(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("devices", "--gateway ADDR[,ADDR...] [--format table|json]", s.err)
	cf.register(fs)
	format := fs.String("format", "table", "output: table or json")
	if err := parseFlags(fs, args); err != nil {
		return err
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
	if *format == "json" {
		return writeProtoJSON(s.out, devs)
	}
	return writeDevicesTable(s.out, devs, time.Now())
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
			if !ok || (d.GetConnected() && !old.GetConnected()) || (d.GetConnected() == old.GetConnected() && d.GetLastSeenUnixMs() > old.GetLastSeenUnixMs()) {
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

func fmtOpt(v *float64, prec int) string {
	if v == nil {
		return "-"
	}
	return fmt.Sprintf("%.*f", prec, *v)
}

func writeDevicesTable(w io.Writer, devs []*pb.Device, now time.Time) error {
	t := newTable(w, 0, "DEVICE", "STATE", "MODE", "LAST SEEN", "SpO2 %", "PULSE /min", "PI %", "SQI", "ALARM", "CONDITIONS", "LABELS")
	for _, d := range devs {
		state := "offline"
		if d.GetConnected() {
			state = "connected"
		}
		seen := "never"
		if ms := d.GetLastSeenUnixMs(); ms > 0 {
			seen = now.Sub(time.UnixMilli(ms)).Round(time.Second).String() + " ago"
		}
		l := d.GetLatest()
		if l == nil {
			l = &pb.TrendPoint{}
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
		t.row(d.GetDeviceId(), state, mode, seen,
			fmtOpt(l.Spo2Pct, 1), fmtOpt(l.PulseBpm, 0), fmtOpt(l.PiPct, 2), fmtOpt(l.Sqi, 2), alarm,
			strings.Join(d.GetActiveConditions(), ","), strings.Join(labels, " "))
	}
	return t.flush()
}
