package main

import (
	"context"
	"fmt"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/ids"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

const retireSummary = `Retire a device from a fleet of gateways on etcd.

A device whose gateway died and that never reconnects is adopted offline by
the gateway that owns it now (device_offline), from its alarm state shared in
etcd; that state is never deleted by itself, so a device taken out of use
would stay adopted, shown offline, for good. retire deletes the device's
shared alarm state from etcd (no gateway adopts it again) and each gateway
asked ends the device's open episodes there (stored and notified as ended),
with an audit entry device.retire naming the gateway that took it and
--reason. Give --gateway every gateway that shows the device (comma-separated;
asking all of them is harmless). Refused, with nothing changed, while the
device streams to any gateway (stop the device first) and on a gateway
without --etcd. A retired device that streams again later is served as any
device. Admin role (--token or $PULSEFLEET_TOKEN).`

func init() {
	register(command{name: "retire", summary: retireSummary, run: runRetire})
}

func runRetire(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	var device, reason string
	fs := newFlagSet("retire", "--gateway ADDR[,ADDR...] --device ID [--reason TEXT] [--token T]", s.err)
	cf.register(fs)
	fs.StringVar(&device, "device", "", "the device to retire (required)")
	fs.StringVar(&reason, "reason", "", "why, for the audit log (at most 200 characters)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if err := ids.Check("--device", device); err != nil {
		return usagef("%v", err)
	}
	if len(reason) > 200 {
		return usagef("--reason: %d characters, want at most 200", len(reason))
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	failed := 0
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			return err
		}
		cctx, cancel := context.WithTimeout(cf.ctx(ctx), 15*time.Second)
		resp, err := pb.NewAdminServiceClient(conn).RetireDevice(cctx, &pb.RetireDeviceRequest{DeviceId: device, Reason: reason})
		cancel()
		conn.Close()
		if err != nil {
			failed++
			fmt.Fprintf(s.err, "gateway %s: %s\n", a, safeText(errorText(err)))
			continue
		}
		known := "not known there"
		if resp.GetKnownHere() {
			known = fmt.Sprintf("%d open episodes ended there", resp.GetEpisodesEnded())
		}
		fmt.Fprintf(s.out, "gateway %s: device %s retired (%s; taken by %s)\n", a, device, known, resp.GetGateway())
	}
	if failed > 0 {
		return fmt.Errorf("device %s not retired at %d of %d gateways (see above)", device, failed, len(addrs))
	}
	return nil
}
