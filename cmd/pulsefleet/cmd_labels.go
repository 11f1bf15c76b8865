package main

import (
	"context"
	"fmt"
	"maps"
	"slices"
	"strings"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "labels",
		summary: `Set the operator's labels of one device on a running gateway (operator role).
The --label KEY=VALUE flags replace the labels set before (none removes them);
they add to the labels the device sends in its introduction and win over
one of the same key (at most 8, key 1..32 and value 0..64 characters). The
gateway audits the change; in a fleet on etcd every gateway applies it.`,
		run: runLabels,
	})
}

func runLabels(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("labels", "--gateway ADDR --device ID [--label KEY=VALUE ...] [--reason TEXT]", s.err)
	cf.register(fs)
	device := fs.String("device", "", "device id (required)")
	reason := fs.String("reason", "", "why, for the audit log (at most 500 characters)")
	var given stringList
	fs.Var(&given, "label", "KEY=VALUE; repeat for several (none removes the device's operator labels)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *device == "" {
		return usagef("--device: required")
	}
	labels := map[string]string{}
	for _, a := range given {
		k, v, ok := strings.Cut(a, "=")
		if !ok || k == "" {
			return usagef("--label: %q, want KEY=VALUE", a)
		}
		if _, dup := labels[k]; dup {
			return usagef("--label: key %q given twice", k)
		}
		labels[k] = v
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	if len(addrs) != 1 {
		return usagef("--gateway: %d addresses, want one (a fleet on etcd applies the change on every gateway)", len(addrs))
	}
	conn, err := cf.dial(addrs[0])
	if err != nil {
		return err
	}
	defer conn.Close()
	cctx, cancel := context.WithTimeout(cf.ctx(ctx), 30*time.Second)
	defer cancel()
	resp, err := pb.NewAdminServiceClient(conn).SetDeviceLabels(cctx, &pb.SetDeviceLabelsRequest{DeviceId: *device, Labels: labels, Reason: *reason})
	if err != nil {
		return fmt.Errorf("gateway %s: %w", addrs[0], err)
	}
	if len(resp.GetLabels()) == 0 {
		fmt.Fprintf(s.out, "device %s: operator labels removed\n", safeText(*device))
		return nil
	}
	var parts []string
	for _, k := range slices.Sorted(maps.Keys(resp.GetLabels())) {
		parts = append(parts, safeText(k)+"="+safeText(resp.GetLabels()[k]))
	}
	fmt.Fprintf(s.out, "device %s: operator labels %s\n", safeText(*device), strings.Join(parts, " "))
	return nil
}
