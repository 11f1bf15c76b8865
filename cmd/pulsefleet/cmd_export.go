package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/export"
	"github.com/pulsefleet/pulsefleet/internal/participants"
	"github.com/pulsefleet/pulsefleet/internal/progress"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

const exportSummary = `Export trend history from a data directory as CSV or as an HL7 FHIR R4 Bundle.

--format csv: t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi,ratio,flags,source,participant,
one row per stored point (t_s in Unix seconds, empty cells for missing values;
participant: the study participant enrolled to the device at that time, empty
when none); the first six columns are the replay/tune trend input, so the file
replays as is.
--format fhir: a Bundle (type collection) with one Device per device and
Observations: SpO2 (LOINC 59408-5 and 2708-6, UCUM %), pulse rate (LOINC
8867-4, UCUM /min), perfusion index (ISO/IEEE 11073 150448, UCUM %), status
final, effectiveDateTime in RFC 3339 UTC. Missing values give no Observation.
An Observation taken while its device was enrolled has a subject: a Patient
resource carrying only the participant's pseudonymous identifier (system from
--patient-system).

--participant PID exports one participant's history: each enrolled device's
points inside its enrolment, one enrolment after the other (not with --device).

T (--from, --to) is RFC 3339 (2026-11-30T22:00:00Z) or Unix seconds; points
with from <= t < to are exported. Output is streamed (large ranges do not fill
memory); --out FILE is written under a temporary name and renamed when
complete (mode 0600: exports hold health data). Progress goes to stderr when
it is a terminal.

--data DIR opens a stopped gateway's store read-only. --gateway ADDR[,ADDR...]
exports through running gateways (FleetService.ExportTrend, viewer role;
--token or $PULSEFLEET_TOKEN) with the same output byte for byte (CSV),
merged across the gateways of a sharded fleet (a point held by two gateways,
the same device and time, is exported once and counted on stderr); each
gateway reads its store in bounded slices, never holding one read
transaction open for long. A gateway that cannot be read does not stop the
export: the file says it is incomplete (CSV: "# incomplete:" comment lines
after the caution, which readers skip; FHIR: a first entry, an
OperationOutcome with issues of code "incomplete"), naming the gateway and
the devices whose history the reachable gateways' ledgers show to be partly
elsewhere; stderr says the same and the command exits 3.

Research tool, not a certified medical device.`

// exportOptions are the flags of `pulsefleet export`.
type exportOptions struct {
	data, format, out, from, to, base string
	participant, patientSystem        string
	devices                           exportDevices
	client                            clientFlags
	wait                              time.Duration
	noPI                              bool
}

// exportDevices collects --device, repeatable and comma-separated.
type exportDevices []string

func (d *exportDevices) String() string { return strings.Join(*d, ",") }
func (d *exportDevices) Set(s string) error {
	for _, id := range strings.Split(s, ",") {
		if id = strings.TrimSpace(id); id != "" {
			*d = append(*d, id)
		}
	}
	return nil
}

func init() {
	register(command{
		name:    "export",
		summary: exportSummary,
		run: func(ctx context.Context, args []string, s stdio) error {
			var o exportOptions
			fs := newFlagSet("export", "(--data DIR | --gateway ADDR[,ADDR...]) [--device ID] [--from T --to T] --format csv|fhir [--out FILE]", s.err)
			fs.StringVar(&o.data, "data", "", "data directory of a stopped gateway")
			o.client.register(fs)
			fs.Var(&o.devices, "device", "device id to export; repeat or comma-separate for several (default: every device with trend points)")
			fs.StringVar(&o.from, "from", "", "first time exported, RFC 3339 or Unix seconds (default: the beginning)")
			fs.StringVar(&o.to, "to", "", "end of the range, exclusive, RFC 3339 or Unix seconds (default: no end)")
			fs.StringVar(&o.format, "format", "", "csv or fhir (required)")
			fs.StringVar(&o.out, "out", "-", "output file, - for stdout")
			fs.StringVar(&o.base, "fhir-base", "", "fhir: base URL for entry fullUrls, e.g. https://fhir.example.org/r4 (default: no fullUrl)")
			fs.BoolVar(&o.noPI, "no-pi", false, "fhir: leave out perfusion index Observations")
			fs.StringVar(&o.participant, "participant", "", "export only this participant's history, stitched from the enrolments of their devices")
			fs.StringVar(&o.patientSystem, "patient-system", "", "fhir: identifier system URI of the Patient resources standing for participants, e.g. https://study.example.org/participant-id")
			fs.DurationVar(&o.wait, "wait", time.Second, "how long to wait for the store's lock")
			if err := parseFlags(fs, args); err != nil {
				return err
			}
			if (o.data == "") == (o.client.gateways == "") {
				return usagef("--data, --gateway: give exactly one")
			}
			if o.format != "csv" && o.format != "fhir" {
				return usagef("--format %q, want csv or fhir", o.format)
			}
			if o.wait <= 0 || o.wait > time.Hour {
				return usagef("--wait %v, want in (0, 1h]", o.wait)
			}
			var opt export.Options
			var err error
			opt.Devices = o.devices
			if o.participant != "" {
				if err := participants.CheckID("--participant", o.participant); err != nil {
					return usagef("%v", err)
				}
				if len(o.devices) > 0 {
					return usagef("--participant, --device: give one (a participant's devices come from the enrolments)")
				}
				opt.Participant = o.participant
			}
			if opt.FromMS, err = parseExportTime("--from", o.from); err != nil {
				return err
			}
			if opt.ToMS, err = parseExportTime("--to", o.to); err != nil {
				return err
			}
			if o.to != "" && o.from != "" && opt.ToMS <= opt.FromMS {
				return usagef("--to %s is not after --from %s", o.to, o.from)
			}
			if o.to != "" && opt.ToMS <= 0 {
				return usagef("--to %s, want after 1970-01-01T00:00:00Z", o.to)
			}
			return runExport(ctx, o, opt, s)
		},
	})
}

// parseExportTime parses RFC 3339 or Unix seconds into Unix ms; "" is 0.
func parseExportTime(flag, v string) (int64, error) {
	if v == "" {
		return 0, nil
	}
	if t, err := time.Parse(time.RFC3339Nano, v); err == nil {
		return t.UnixMilli(), nil
	}
	f, err := strconv.ParseFloat(v, 64)
	if err != nil || math.IsNaN(f) || math.IsInf(f, 0) || math.Abs(f) > 1e13 {
		return 0, usagef("%s %q, want RFC 3339 (2026-11-30T22:00:00Z) or Unix seconds (1796076000)", flag, v)
	}
	return int64(math.Round(f * 1000)), nil
}

func runExport(ctx context.Context, o exportOptions, opt export.Options, s stdio) error {
	var src export.Source
	var rs *remoteSource
	var gaps *historyGaps
	var addrs []string
	if o.client.gateways != "" {
		var err error
		if addrs, err = o.client.addrs(); err != nil {
			return err
		}
		if rs, err = newRemoteSource(ctx, &o.client, addrs); err != nil {
			return err
		}
		defer rs.Close()
		src = rs
		reachable := reachableOf(addrs, rs.failed)
		if opt.Enrolments, err = remoteEnrolments(ctx, &o.client, reachable); err != nil {
			return err
		}
		gaps = findGaps(ctx, &o.client, reachable, rs.failed, o.devices)
	} else {
		db, err := openExportStore(o)
		if err != nil {
			return err
		}
		defer db.Close()
		src = db
		es, err := db.Enrolments("", "")
		if err != nil {
			return err
		}
		for _, e := range es {
			opt.Enrolments = append(opt.Enrolments, e.Interval())
		}
	}
	prog := newExportProgress(s.err)
	opt.Progress = prog.update
	notes := gaps.notes("trend points", 1000)
	err := writeExportFile(o.out, s.out, func(w io.Writer) error {
		var wr export.Writer
		if o.format == "csv" {
			c := export.NewCSVWriter(w)
			c.SetIncomplete(notes)
			wr = c
		} else {
			wr = export.NewFHIRWriter(w, export.FHIROptions{Timestamp: time.Now(), BaseURL: o.base, SkipPI: o.noPI, PatientSystem: o.patientSystem, Incomplete: notes})
		}
		st, err := export.Run(ctx, src, wr, opt)
		prog.finish(st, err)
		return err
	})
	if err != nil || rs == nil {
		return err
	}
	if rs.dups > 0 {
		fmt.Fprintf(s.err, "pulsefleet export: %d points held by two gateways (the same device and time) were exported once\n", rs.dups)
	}
	printGaps(s.err, "export", gaps, "trend points")
	return incomplete("trend points", len(addrs), rs.failed)
}

func openExportStore(o exportOptions) (*store.DB, error) {
	db, err := store.Open(o.data, store.Options{ReadOnly: true, Timeout: o.wait})
	if err != nil {
		if errors.Is(err, store.ErrLocked) {
			return nil, fmt.Errorf("--data %s: %w: export opens the store read-only but a running gateway holds it: export through it with 'pulsefleet export --gateway ADDR', or stop the gateway", o.data, err)
		}
		return nil, fmt.Errorf("--data %s: %w", o.data, err)
	}
	return db, nil
}

// writeExportFile streams into path through a temporary file in the same
// directory, renamed over path only when write succeeds; "-" writes to stdout.
func writeExportFile(path string, stdout io.Writer, write func(io.Writer) error) error {
	if path == "-" || path == "" {
		return write(stdout)
	}
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return fmt.Errorf("--out %s: %w", path, err)
	}
	tmp := f.Name()
	fail := func(err error) error {
		f.Close()
		os.Remove(tmp)
		return err
	}
	if err := write(f); err != nil {
		return fail(err)
	}
	if err := f.Sync(); err != nil {
		return fail(fmt.Errorf("--out %s: %w", path, err))
	}
	if err := f.Close(); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("--out %s: %w", path, err)
	}
	if err := os.Rename(tmp, path); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("--out %s: %w", path, err)
	}
	return nil
}

// exportProgress prints a one-line status to a terminal, at most every 200 ms.
type exportProgress struct {
	line  *progress.Line
	start time.Time
}

func newExportProgress(stderr io.Writer) *exportProgress {
	return &exportProgress{line: progress.New(stderr, 200*time.Millisecond), start: time.Now()}
}

func (p *exportProgress) update(pr export.Progress) {
	if !pr.Done {
		p.line.Draw("export: %d points, device %d/%d %s", pr.Points, pr.DeviceIndex, pr.DeviceCount, pr.Device)
	}
}

func (p *exportProgress) finish(st export.Stats, err error) {
	secs := time.Since(p.start).Seconds()
	state := "done"
	if err != nil {
		state = "stopped"
	}
	p.line.End("export %s: %d points of %d devices in %.1f s (%.0f points/s)", state, st.Points, st.Devices, secs, float64(st.Points)/max(secs, 1e-9))
}
