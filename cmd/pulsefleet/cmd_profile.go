package main

import (
	"context"
	"fmt"
	"os"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/profiles"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "profile",
		summary: "Read, set or list the alarm profiles of a running gateway.\n\n" +
			"  profile list [--gateway ADDR]             built-in profiles; with --gateway, each device's profile and where it comes from\n" +
			"  profile get --gateway ADDR [--device ID]  the YAML in force (the gateway default without --device)\n" +
			"  profile set --gateway ADDR [--device ID] (--file F | --builtin NAME) [--reason TEXT]\n" +
			"                                            needs an admin token; the gateway audits it (profile.set)",
		run: runProfile,
	})
}

const profileSynopsis = "get|set|list --gateway ADDR [--device ID] [--file F | --builtin NAME] [--reason TEXT]"

func runProfile(ctx context.Context, args []string, s stdio) error {
	if len(args) == 0 || strings.HasPrefix(args[0], "-") {
		if len(args) > 0 && (args[0] == "-h" || args[0] == "--help") {
			fs := newFlagSet("profile", profileSynopsis, s.err)
			fs.Usage()
			return errHelp
		}
		return usagef("want a subcommand: get, set or list")
	}
	sub, args := args[0], args[1:]
	var cf clientFlags
	fs := newFlagSet("profile", profileSynopsis, s.err)
	cf.register(fs)
	device := fs.String("device", "", "device id (default: the gateway's default profile)")
	file := fs.String("file", "", "set: a profile YAML file")
	builtin := fs.String("builtin", "", "set: a built-in profile ("+strings.Join(profiles.Names(), ", ")+")")
	reason := fs.String("reason", "", "set: why (kept in the gateway's audit log)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	switch sub {
	case "list":
		return profileList(ctx, &cf, s)
	case "get", "set":
	default:
		return usagef("unknown subcommand %q, want get, set or list", sub)
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	if len(addrs) != 1 {
		return usagef("--gateway: one address for profile %s, got %d", sub, len(addrs))
	}
	conn, err := cf.dial(addrs[0])
	if err != nil {
		return err
	}
	defer conn.Close()
	client := pb.NewFleetServiceClient(conn)
	cctx, cancel := context.WithTimeout(cf.ctx(ctx), time.Minute)
	defer cancel()
	if sub == "get" {
		resp, err := client.GetAlarmProfile(cctx, &pb.GetAlarmProfileRequest{DeviceId: *device})
		if err != nil {
			return fmt.Errorf("gateway %s: %w", addrs[0], err)
		}
		fmt.Fprintf(s.out, "# profile %s (%s) from %s\n%s", resp.GetName(), resp.GetOrigin(), addrs[0], resp.GetProfileYaml())
		return nil
	}
	var text string
	switch {
	case (*file == "") == (*builtin == ""):
		return usagef("profile set: give one of --file F or --builtin NAME")
	case *builtin != "":
		if _, err := profiles.Bytes(*builtin); err != nil {
			return usagef("--builtin: %v", err)
		}
		text = *builtin // the gateway resolves the name from its own copy
	default:
		b, err := os.ReadFile(*file)
		if err != nil {
			return fmt.Errorf("--file: %w", err)
		}
		if _, err := alarms.ParseProfile(b); err != nil {
			return fmt.Errorf("--file %s: %w", *file, err)
		}
		text = string(b)
	}
	resp, err := client.SetAlarmProfile(cctx, &pb.SetAlarmProfileRequest{DeviceId: *device, ProfileYaml: text, Reason: *reason})
	if err != nil {
		return fmt.Errorf("gateway %s: %w", addrs[0], err)
	}
	target := "the gateway default"
	if *device != "" {
		target = "device " + *device
	}
	fmt.Fprintf(s.out, "profile %s in force for %s on %s\n", resp.GetName(), safeText(target), addrs[0])
	return nil
}

// profileList prints the built-in profiles and, with --gateway, each
// device's profile and its origin.
func profileList(ctx context.Context, cf *clientFlags, s stdio) error {
	tw := tabwriter.NewWriter(s.out, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "BUILT-IN\tCONDITIONS")
	for _, n := range profiles.Names() {
		p, err := profiles.Get(n)
		if err != nil {
			return err
		}
		kinds := make([]string, 0, len(p.Conditions))
		for _, c := range p.Conditions {
			kinds = append(kinds, c.Kind.String())
		}
		fmt.Fprintf(tw, "%s\t%s\n", n, strings.Join(kinds, ","))
	}
	if err := tw.Flush(); err != nil || strings.TrimSpace(cf.gateways) == "" {
		return err
	}
	addrs, _ := cf.addrs()
	fmt.Fprintln(s.out)
	tw = tabwriter.NewWriter(s.out, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "GATEWAY\tDEVICE\tPROFILE\tORIGIN")
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			return err
		}
		client := pb.NewFleetServiceClient(conn)
		cctx, cancel := context.WithTimeout(cf.ctx(ctx), time.Minute)
		err = func() error {
			def, err := client.GetAlarmProfile(cctx, &pb.GetAlarmProfileRequest{})
			if err != nil {
				return fmt.Errorf("gateway %s: %w", a, err)
			}
			fmt.Fprintf(tw, "%s\t(default)\t%s\t%s\n", a, safeCell(def.GetName()), def.GetOrigin())
			devs, err := client.ListDevices(cctx, &pb.ListDevicesRequest{})
			if err != nil {
				return fmt.Errorf("gateway %s: %w", a, err)
			}
			for _, d := range devs.GetDevices() {
				p, err := client.GetAlarmProfile(cctx, &pb.GetAlarmProfileRequest{DeviceId: d.GetDeviceId()})
				if err != nil {
					return fmt.Errorf("gateway %s device %s: %w", a, d.GetDeviceId(), err)
				}
				fmt.Fprintf(tw, "%s\t%s\t%s\t%s\n", a, safeCell(d.GetDeviceId()), safeCell(p.GetName()), p.GetOrigin())
			}
			return nil
		}()
		cancel()
		conn.Close()
		if err != nil {
			return err
		}
	}
	return tw.Flush()
}
