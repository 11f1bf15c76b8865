package main

import (
	"context"
	"encoding/csv"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"io"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"
	"unicode/utf8"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/encoding/protojson"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "quality",
		summary: `Show each device's signal quality and uptime from one or more running gateways.
Per device: sessions and reconnects, uptime over 1 h / 24 h / 7 d, data messages
accepted, lost (sequence gaps), duplicate, late and rejected, device clock drift
(ppm, + = device fast), effective raw sample rate, share of seconds with a valid
SpO2, SQI and PI percentiles (p10/p50/p90), clipping and low-resolution shares,
battery. Several gateways (comma-separated) are merged: a device reported by
more than one (during a reshard) is taken from the gateway where it was up
most in the last hour.`,
		run: runQuality,
	})
}

// qualityColumns is the CSV header (one row per device; empty = unknown).
var qualityColumns = []string{"device", "sessions", "reconnects", "uptime_1h", "uptime_24h", "uptime_7d",
	"chunks_accepted", "chunks_lost", "duplicates", "late_chunks", "chunks_rejected", "clock_drift_ppm",
	"effective_sample_rate_hz", "valid_spo2_share", "sqi_p10", "sqi_p50", "sqi_p90", "pi_p10_pct", "pi_p50_pct", "pi_p90_pct",
	"clipping_share", "low_resolution_share", "battery_pct"}

func runQuality(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("quality", "--gateway ADDR[,ADDR...] [--device ID] [--format table|csv|json]", s.err)
	cf.register(fs)
	device := fs.String("device", "", "only this device")
	format := fs.String("format", "table", "output: table (readable), csv or json")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	switch *format {
	case "table", "csv", "json":
	default:
		return usagef("--format: %q, want table, csv or json", *format)
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	qs, err := fetchQuality(ctx, &cf, addrs, *device)
	if err != nil {
		return err
	}
	switch *format {
	case "csv":
		return writeQualityCSV(s.out, qs)
	case "json":
		return writeProtoJSON(s.out, qs, protojson.MarshalOptions{UseProtoNames: true, EmitUnpopulated: true})
	}
	return writeQualityTable(s.out, qs)
}

// fetchQuality asks every gateway and merges by device id.
func fetchQuality(ctx context.Context, cf *clientFlags, addrs []string, device string) ([]*pb.DeviceQuality, error) {
	byID := map[string]*pb.DeviceQuality{}
	keep := func(q *pb.DeviceQuality) {
		old, ok := byID[q.GetDeviceId()]
		if !ok || q.GetUptime_1H() > old.GetUptime_1H() ||
			(q.GetUptime_1H() == old.GetUptime_1H() && q.GetChunksAccepted() > old.GetChunksAccepted()) {
			byID[q.GetDeviceId()] = q
		}
	}
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			return nil, err
		}
		cctx, cancel := context.WithTimeout(cf.ctx(ctx), 30*time.Second)
		fc := pb.NewFleetServiceClient(conn)
		if device != "" {
			resp, err := fc.GetDeviceQuality(cctx, &pb.GetDeviceQualityRequest{DeviceId: device})
			switch {
			case status.Code(err) == codes.NotFound && len(addrs) > 1:
				// another shard may know it
			case err != nil:
				cancel()
				conn.Close()
				return nil, fmt.Errorf("gateway %s: %w", a, err)
			default:
				keep(resp.GetQuality())
			}
		} else {
			resp, err := fc.ListDeviceQuality(cctx, &pb.ListDeviceQualityRequest{})
			if err != nil {
				cancel()
				conn.Close()
				return nil, fmt.Errorf("gateway %s: %w", a, err)
			}
			for _, q := range resp.GetQualities() {
				keep(q)
			}
		}
		cancel()
		conn.Close()
	}
	if device != "" && len(byID) == 0 {
		return nil, fmt.Errorf("--device: %q is not known to any of the %d gateways", device, len(addrs))
	}
	out := make([]*pb.DeviceQuality, 0, len(byID))
	for _, q := range byID {
		out = append(out, q)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].GetDeviceId() < out[j].GetDeviceId() })
	return out, nil
}

func ff(v float64, prec int) string { return strconv.FormatFloat(v, 'f', prec, 64) }

// estCell prints an estimate, or nothing when there is none yet.
func estCell(v *float64, prec int) string {
	if v == nil {
		return ""
	}
	return ff(*v, prec)
}

func distCells(d *pb.Distribution, prec int) []string {
	if d.GetCount() == 0 {
		return []string{"", "", ""}
	}
	return []string{ff(d.GetP10(), prec), ff(d.GetP50(), prec), ff(d.GetP90(), prec)}
}

func batteryCell(v float64) string {
	if v < 0 {
		return ""
	}
	return ff(v, 0)
}

func writeQualityCSV(w io.Writer, qs []*pb.DeviceQuality) error {
	if err := caution.WriteComment(w); err != nil {
		return err
	}
	cw := csv.NewWriter(w)
	if err := cw.Write(qualityColumns); err != nil {
		return err
	}
	for _, q := range qs {
		row := []string{q.GetDeviceId(), strconv.FormatUint(q.GetSessions(), 10), strconv.FormatUint(q.GetReconnects(), 10),
			ff(q.GetUptime_1H(), 4), ff(q.GetUptime_24H(), 4), ff(q.GetUptime_7D(), 4),
			strconv.FormatUint(q.GetChunksAccepted(), 10), strconv.FormatUint(q.GetChunksLost(), 10), strconv.FormatUint(q.GetDuplicates(), 10),
			strconv.FormatUint(q.GetLateChunks(), 10), strconv.FormatUint(q.GetChunksRejected(), 10),
			estCell(q.ClockDriftPpm, 2), estCell(q.EffectiveSampleRateHz, 3), ff(q.GetValidSpo2Share(), 4)}
		row = append(row, distCells(q.GetSqi(), 3)...)
		row = append(row, distCells(q.GetPiPct(), 3)...)
		row = append(row, ff(q.GetClippingShare(), 4), ff(q.GetLowResolutionShare(), 4), batteryCell(q.GetBatteryPct()))
		if err := cw.Write(row); err != nil {
			return err
		}
	}
	cw.Flush()
	return cw.Error()
}

func pctCell(v float64) string { return ff(100*v, 1) }

// uptimeCell is "-" while the window has no coverage (no part of it since
// the device was first seen), as on the web page.
func uptimeCell(share, windowS float64) string {
	if windowS <= 0 {
		return "-"
	}
	return pctCell(share)
}

func orDash(s string) string {
	if s == "" {
		return "-"
	}
	return s
}

func writeQualityTable(w io.Writer, qs []*pb.DeviceQuality) error {
	// Numbers align right; device ids are padded so they read left-aligned.
	width := len("DEVICE")
	for _, q := range qs {
		width = max(width, utf8.RuneCountInString(safeCell(q.GetDeviceId())))
	}
	pad := func(s string) string { // the row escapes it; pad for the escaped width
		return s + strings.Repeat(" ", max(0, width-utf8.RuneCountInString(safeCell(s))))
	}
	tw := newTable(w, tabwriter.AlignRight)
	tw.rowTerminated(pad("DEVICE"), "SESSIONS", "RECONN", "UP 1h %", "UP 24h %", "UP 7d %", "ACCEPTED", "LOST", "DUP", "LATE", "REJECTED", "DRIFT ppm", "RATE Hz", "VALID SpO2 %", "SQI p10/p50/p90", "PI % p10/p50/p90", "CLIP %", "LOWRES %", "BATTERY %")
	for _, q := range qs {
		sqi, pi := distCells(q.GetSqi(), 2), distCells(q.GetPiPct(), 2)
		dist := func(c []string) string {
			if c[0] == "" {
				return "-"
			}
			return c[0] + "/" + c[1] + "/" + c[2]
		}
		u := func(v uint64) string { return strconv.FormatUint(v, 10) }
		tw.rowTerminated(pad(q.GetDeviceId()), u(q.GetSessions()), u(q.GetReconnects()), uptimeCell(q.GetUptime_1H(), q.GetUptime_1HWindowS()), uptimeCell(q.GetUptime_24H(), q.GetUptime_24HWindowS()), uptimeCell(q.GetUptime_7D(), q.GetUptime_7DWindowS()),
			u(q.GetChunksAccepted()), u(q.GetChunksLost()), u(q.GetDuplicates()), u(q.GetLateChunks()), u(q.GetChunksRejected()),
			orDash(estCell(q.ClockDriftPpm, 1)), orDash(estCell(q.EffectiveSampleRateHz, 2)), pctCell(q.GetValidSpo2Share()),
			dist(sqi), dist(pi), pctCell(q.GetClippingShare()), pctCell(q.GetLowResolutionShare()), orDash(batteryCell(q.GetBatteryPct())))
	}
	return tw.flush()
}
