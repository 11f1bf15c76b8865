package main

import (
	"context"
	"fmt"
	"io"
	"math"
	"slices"
	"sort"

	"google.golang.org/grpc"

	"github.com/pulsefleet/pulsefleet/internal/export"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// remoteSource is an export.Source over FleetService.ExportTrend of one or
// more running gateways: device lists merged, each device's points from the
// gateways that hold them (merged by time when a device moved between
// shards, one point per time).
type remoteSource struct {
	ctx     context.Context
	cf      *clientFlags
	conns   map[string]*grpc.ClientConn
	devices []store.Device
	owners  map[string][]string // device -> gateways with trend points
	trend   []string
	failed  []gatewayError // gateways that could not be read: their history is missing
	dups    int64          // points held by two gateways, exported once
}

var _ export.Source = (*remoteSource)(nil)

// newRemoteSource reads the device lists of addrs. A gateway that cannot
// be read is left out and listed in failed (the export goes on with the
// others and says it is incomplete); when none can be read it fails.
func newRemoteSource(ctx context.Context, cf *clientFlags, addrs []string) (*remoteSource, error) {
	r := &remoteSource{ctx: ctx, cf: cf, conns: map[string]*grpc.ClientConn{}, owners: map[string][]string{}}
	byID := map[string]store.Device{}
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			r.Close()
			return nil, err
		}
		lctx, cancel := context.WithCancel(ctx)
		st, err := pb.NewFleetServiceClient(conn).ExportTrend(cf.ctx(lctx), &pb.ExportTrendRequest{DevicesOnly: true})
		var m *pb.ExportTrendResponse
		if err == nil {
			m, err = st.Recv()
		}
		cancel()
		if err != nil {
			conn.Close()
			r.failed = append(r.failed, gatewayError{a, fmt.Errorf("export from %s: %w", a, err)})
			continue
		}
		r.conns[a] = conn
		for _, d := range m.GetDevices() {
			if _, ok := byID[d.GetDeviceId()]; !ok {
				byID[d.GetDeviceId()] = store.Device{ID: d.GetDeviceId(), Model: d.GetModel(), Firmware: d.GetFirmware()}
			}
		}
		for _, id := range m.GetTrendDeviceIds() {
			r.owners[id] = append(r.owners[id], a)
		}
	}
	if len(r.failed) == len(addrs) {
		r.Close()
		return nil, gatewayFailures("trend points", len(addrs), r.failed)
	}
	for _, d := range byID {
		r.devices = append(r.devices, d)
	}
	sort.Slice(r.devices, func(i, j int) bool { return r.devices[i].ID < r.devices[j].ID })
	for id := range r.owners {
		r.trend = append(r.trend, id)
	}
	slices.Sort(r.trend)
	return r, nil
}

func (r *remoteSource) Close() {
	for _, c := range r.conns {
		c.Close()
	}
}

func (r *remoteSource) Devices() ([]store.Device, error) { return r.devices, nil }
func (r *remoteSource) TrendDevices() ([]string, error)  { return r.trend, nil }

func (r *remoteSource) Trend(device string, fromMS, toMS int64, fn func(store.Point) bool) error {
	owners := r.owners[device]
	if toMS == math.MaxInt64 {
		toMS = 0
	}
	stream := func(addr string, each func(store.Point) bool) error {
		ctx, cancel := context.WithCancel(r.ctx)
		defer cancel()
		st, err := pb.NewFleetServiceClient(r.conns[addr]).ExportTrend(r.cf.ctx(ctx),
			&pb.ExportTrendRequest{DeviceIds: []string{device}, FromUnixMs: fromMS, ToUnixMs: toMS})
		if err != nil {
			return fmt.Errorf("export from %s: %w", addr, err)
		}
		if _, err := st.Recv(); err != nil { // the device lists
			return fmt.Errorf("export from %s: %w", addr, err)
		}
		for {
			m, err := st.Recv()
			if err == io.EOF {
				return nil
			}
			if err != nil {
				return fmt.Errorf("export from %s: device %q: %w", addr, device, err)
			}
			for _, p := range m.GetPoints() {
				if !each(pointFromProto(device, p)) {
					return nil
				}
			}
		}
	}
	if len(owners) == 1 {
		return stream(owners[0], fn)
	}
	var all []store.Point
	for _, a := range owners {
		if err := stream(a, func(p store.Point) bool { all = append(all, p); return true }); err != nil {
			return err
		}
	}
	sort.SliceStable(all, func(i, j int) bool { return all[i].TimeMS < all[j].TimeMS })
	for i, p := range all {
		if i > 0 && p.TimeMS == all[i-1].TimeMS {
			r.dups++
			continue
		}
		if !fn(p) {
			return nil
		}
	}
	return nil
}

func pointFromProto(device string, p *pb.TrendPoint) store.Point {
	opt := func(v *float64) float64 {
		if v == nil {
			return math.NaN()
		}
		return *v
	}
	return store.Point{Device: device, TimeMS: p.GetTimeUnixMs(), SpO2: opt(p.Spo2Pct), Pulse: opt(p.PulseBpm), PI: opt(p.PiPct),
		SQI: opt(p.Sqi), Ratio: opt(p.Ratio), Flags: uint16(p.GetFlags()), Source: uint8(p.GetSource())}
}
