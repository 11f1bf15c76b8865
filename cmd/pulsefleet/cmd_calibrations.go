package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"sort"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/calibration"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "calibrations",
		summary: "Manage the calibrations a running gateway applies: put, list, assign.\n\n" +
			"  pulsefleet calibrations put    --gateway ADDR --file CURVE.yaml   store a new version (admin)\n" +
			"  pulsefleet calibrations list   --gateway ADDR                     versions and assignments\n" +
			"  pulsefleet calibrations assign --gateway ADDR (--model M | --device ID) --calibration NAME[@vN]\n" +
			"                                 assign (empty --calibration removes); applies from the device's next stream\n\n" +
			"Curve files come from `pulsefleet calibrate --out`. A device's introduction may also name a\n" +
			"calibration; otherwise its own assignment, then its model's, then the empirical line apply.\n" +
			"Every change is audited.",
		run: runCalibrations,
	})
}

func runCalibrations(ctx context.Context, args []string, s stdio) error {
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" {
		fmt.Fprintln(s.err, commands["calibrations"].summary)
		if len(args) == 0 {
			return usagef("want a subcommand: put, list or assign")
		}
		return errHelp
	}
	sub, args := args[0], args[1:]
	var cf clientFlags
	fs := newFlagSet("calibrations "+sub, "--gateway ADDR [flags]", s.err)
	cf.register(fs)
	file := fs.String("file", "", "put: calibration curve file (YAML)")
	model := fs.String("model", "", "assign: device model")
	device := fs.String("device", "", "assign: device id")
	ref := fs.String("calibration", "", "assign: NAME or NAME@vN (empty removes the assignment)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	conn, err := cf.dial(addrs[0])
	if err != nil {
		return err
	}
	defer conn.Close()
	cl := pb.NewAdminServiceClient(conn)
	cctx, cancel := context.WithTimeout(cf.ctx(ctx), 30*time.Second)
	defer cancel()
	switch sub {
	case "put":
		if *file == "" {
			return usagef("--file: required")
		}
		data, err := os.ReadFile(*file)
		if err != nil {
			return fmt.Errorf("--file: %w", err)
		}
		if _, err := calibration.Parse(data); err != nil {
			return fmt.Errorf("--file %s: %w", *file, err)
		}
		resp, err := cl.PutCalibration(cctx, &pb.PutCalibrationRequest{CurveYaml: string(data)})
		if err != nil {
			return err
		}
		fmt.Fprintf(s.out, "stored %s@v%d\n", resp.GetCalibration().GetName(), resp.GetCalibration().GetVersion())
	case "list":
		resp, err := cl.ListCalibrations(cctx, &pb.ListCalibrationsRequest{})
		if err != nil {
			return err
		}
		if err := writeCalibrationsTable(s.out, resp); err != nil {
			return err
		}
	case "assign":
		if (*model == "") == (*device == "") {
			return usagef("--model, --device: give exactly one")
		}
		resp, err := cl.AssignCalibration(cctx, &pb.AssignCalibrationRequest{Model: *model, DeviceId: *device, Calibration: *ref})
		if err != nil {
			return err
		}
		if resp.GetAssignment().GetCalibration() == "" {
			fmt.Fprintf(s.out, "%s: assignment removed\n", resp.GetAssignment().GetTarget())
		} else {
			fmt.Fprintf(s.out, "%s -> %s\n", resp.GetAssignment().GetTarget(), resp.GetAssignment().GetCalibration())
		}
	default:
		return usagef("unknown subcommand %q, want put, list or assign", sub)
	}
	return nil
}

// writeCalibrationsTable prints the stored calibrations and the assignments.
func writeCalibrationsTable(w io.Writer, resp *pb.ListCalibrationsResponse) error {
	tw := newTable(w, 0, "CALIBRATION", "STORED", "BY", "CURVE")
	for _, c := range resp.GetCalibrations() {
		eq := "?"
		if cv, err := calibration.Parse([]byte(c.GetCurveYaml())); err == nil {
			eq = cv.Equation()
		}
		tw.row(fmt.Sprintf("%s@v%d", c.GetName(), c.GetVersion()), time.UnixMilli(c.GetCreatedUnixMs()).UTC().Format(time.RFC3339), c.GetCreatedBy(), eq)
	}
	if err := tw.flush(); err != nil {
		return err
	}
	as := resp.GetAssignments()
	sort.Slice(as, func(i, j int) bool { return as[i].GetTarget() < as[j].GetTarget() })
	fmt.Fprintln(w)
	tw = newTable(w, 0, "ASSIGNED TO", "CALIBRATION")
	for _, a := range as {
		tw.row(a.GetTarget(), a.GetCalibration())
	}
	return tw.flush()
}
