package main

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"os"
	"runtime/pprof"
	"sort"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/scenarios"
	"github.com/pulsefleet/pulsefleet/internal/sim"
)

const simSynopsis = "--gateway ADDR --devices N --rate HZ --duration DUR --mode raw|summary [--scenario NAME|FILE] [--seed N] [faults]"

func init() {
	register(command{
		name: "sim",
		summary: `Run a simulated fleet of devices against a gateway over real gRPC.
Each device has its own seed-derived patient (or one from a scenario), sends
raw PPG chunks or per-second summaries, keeps unacknowledged chunks, resumes
where the gateway says after reconnecting, and follows redirects. Faults can
be injected (--drop-every, --corrupt-rate, --clock-drift-ppm). Progress goes
to stderr; the last line on stdout is one JSON object:
{"devices":N,"frames_sent":N,"frames_acked":N,"samples_sent":N,"rejected":N,"ack_p50_ms":X,"ack_p99_ms":X,...}
Shipped scenarios: ` + strings.Join(scenarios.Names(), ", ") + ` (docs/scenarios.md).`,
		run: runSim,
	})
}

// simFlags are the flags sim and bench share.
type simFlags struct {
	gateway, mode, scenario, token, tokenFile, idPrefix string
	perDeviceOut, cpuProfile                            string
	devices, chunk, perConn                             int
	rate, speed, corrupt, drift                         float64
	duration, dropEvery, progress, drain                time.Duration
	seed                                                uint64
}

func (f *simFlags) register(fs *flag.FlagSet, withGateway bool) {
	if withGateway {
		fs.StringVar(&f.gateway, "gateway", "", "gRPC address of the gateway, host:port (required)")
		fs.StringVar(&f.scenario, "scenario", "", "scenario: a shipped name ("+strings.Join(scenarios.Names(), ", ")+") or a YAML file; it names the fleet (no --devices)")
		fs.Float64Var(&f.speed, "speed", 0, "time compression: scenario seconds per wall second, 0.01..100000 (default: the scenario's, else 1)")
		fs.DurationVar(&f.dropEvery, "drop-every", 0, "drop each device's stream about this often (0 = never)")
		fs.Float64Var(&f.corrupt, "corrupt-rate", 0, "share of data messages sent corrupt (out-of-range codes, wrong lengths, absurd rates), 0..1")
		fs.Float64Var(&f.drift, "clock-drift-ppm", 0, "spread device clock drift over +-this many ppm")
		fs.StringVar(&f.token, "token", "", `bearer token every device sends ("authorization: Bearer TOKEN")`)
		fs.StringVar(&f.tokenFile, "token-file", "", `file with one "device_id token" per line (overrides --token per device)`)
		fs.StringVar(&f.idPrefix, "id-prefix", "sim", "device ids are PREFIX-0001, PREFIX-0002, ... (without --scenario)")
		fs.StringVar(&f.mode, "mode", "raw", "what devices send: raw (PPG chunks) or summary (per-second values); a scenario's device entries may say otherwise")
		fs.DurationVar(&f.drain, "drain", 10*time.Second, "after sending stops, wait this long for the last acknowledgements")
		fs.StringVar(&f.cpuProfile, "cpuprofile", "", "write a CPU profile of the client (pprof) to this file")
		fs.StringVar(&f.perDeviceOut, "per-device-out", "", "also write each device's acknowledged counts to this CSV file (device,mode,frames_acked,samples_acked,acked_through)")
	}
	fs.IntVar(&f.devices, "devices", 10, "number of devices, 1..100000")
	fs.Float64Var(&f.rate, "rate", 100, "raw sample rate per device in Hz, 25..1000")
	fs.DurationVar(&f.duration, "duration", 60*time.Second, "how long devices send (wall time); with --scenario the default is the scenario's length / speed")
	fs.Uint64Var(&f.seed, "seed", 1, "seed of every patient, clock drift and fault")
	fs.IntVar(&f.chunk, "chunk", 25, "samples per raw chunk, 1..1000")
	fs.IntVar(&f.perConn, "devices-per-conn", 500, "devices sharing one gRPC connection")
	fs.DurationVar(&f.progress, "progress-every", 5*time.Second, "interval of progress lines on stderr")
}

func runSim(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("sim", simSynopsis, s.err)
	var f simFlags
	f.register(fs, true)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	set := map[string]bool{}
	fs.Visit(func(fl *flag.Flag) { set[fl.Name] = true })
	opts, err := f.options(set)
	if err != nil {
		return err
	}
	opts.Progress = s.err
	if f.cpuProfile != "" {
		stop, err := startCPUProfile(f.cpuProfile)
		if err != nil {
			return err
		}
		defer stop()
	}
	rep, err := sim.Run(ctx, opts)
	if err != nil {
		return err
	}
	if f.perDeviceOut != "" {
		if err := writePerDevice(f.perDeviceOut, rep); err != nil {
			return err
		}
	}
	if err := writeJSONLine(s, rep); err != nil {
		return err
	}
	return nothingAcked(rep, opts.Gateway)
}

// nothingAcked fails a run in which data was due but the gateway
// acknowledged none of it: the run did not do its job, whatever it sent.
func nothingAcked(rep *sim.Report, gateway string) error {
	if rep.FramesAcked > 0 || rep.Devices == 0 {
		return nil
	}
	last := ""
	if rep.LastError != "" {
		last = "; last error: " + errorText(errors.New(rep.LastError))
	}
	return fmt.Errorf("nothing acknowledged: the gateway at %s confirmed none of %d frames sent (%d stream errors)%s",
		gateway, rep.FramesSent, rep.StreamErrors, last)
}

// writePerDevice writes the per-device CSV of --per-device-out.
func writePerDevice(path string, rep *sim.Report) error {
	ids := make([]string, 0, len(rep.PerDevice))
	for id := range rep.PerDevice {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	var b strings.Builder
	b.WriteString("device,mode,frames_acked,samples_acked,acked_through\n")
	for _, id := range ids {
		d := rep.PerDevice[id]
		fmt.Fprintf(&b, "%s,%s,%d,%d,%d\n", id, d.Mode, d.FramesAcked, d.SamplesAcked, d.AckedThrough)
	}
	if err := os.WriteFile(path, []byte(b.String()), 0o644); err != nil {
		return fmt.Errorf("per-device counts: %w", err)
	}
	return nil
}

// options turns the flags into sim.Options; set holds the flags given.
func (f *simFlags) options(set map[string]bool) (sim.Options, error) {
	o := sim.Options{
		Gateway: f.gateway, Devices: f.devices, IDPrefix: f.idPrefix, RateHz: f.rate, Chunk: f.chunk,
		Duration: f.duration, Speed: f.speed, Seed: f.seed, DropEvery: f.dropEvery, CorruptRate: f.corrupt,
		ClockDriftPPM: f.drift, Token: f.token, DevicesPerConn: f.perConn, Drain: f.drain,
		ProgressEvery: f.progress,
	}
	if f.drain == 0 {
		o.Drain = -1
	}
	switch {
	case f.gateway == "":
		return o, usagef("--gateway is required (host:port of a running gateway, e.g. from 'pulsefleet serve')")
	case f.mode != "raw" && f.mode != "summary":
		return o, usagef("--mode %q, want raw or summary", f.mode)
	case f.devices < 1 || f.devices > 100000:
		return o, usagef("--devices %d, want 1..100000", f.devices)
	case f.rate < 25 || f.rate > 1000:
		return o, usagef("--rate %v Hz, want 25..1000", f.rate)
	case f.chunk < 1 || f.chunk > 1000:
		return o, usagef("--chunk %d samples, want 1..1000", f.chunk)
	case f.duration < 0:
		return o, usagef("--duration %v, want 0 or more", f.duration)
	case f.corrupt < 0 || f.corrupt > 1:
		return o, usagef("--corrupt-rate %v, want 0..1", f.corrupt)
	case f.speed != 0 && (f.speed < 0.01 || f.speed > 100000):
		return o, usagef("--speed %v, want 0.01..100000", f.speed)
	case f.drift < 0 || f.drift > 100000:
		return o, usagef("--clock-drift-ppm %v, want 0..100000", f.drift)
	case f.dropEvery < 0:
		return o, usagef("--drop-every %v, want 0 (never) or more", f.dropEvery)
	case f.perConn < 1:
		return o, usagef("--devices-per-conn %d, want 1 or more", f.perConn)
	case f.progress <= 0:
		return o, usagef("--progress-every %v, want more than 0", f.progress)
	}
	if set["mode"] || f.scenario == "" {
		o.Mode = sim.Mode(f.mode)
	}
	if f.scenario != "" {
		if set["devices"] {
			return o, usagef("--devices and --scenario: the scenario names its fleet; leave out --devices")
		}
		sc, err := scenarios.Load(f.scenario)
		if err != nil {
			return o, err
		}
		o.Scenario = sc
		if !set["rate"] {
			o.RateHz = 0 // the scenario's
		}
		if !set["duration"] {
			o.Duration = 0 // the scenario's length / speed
		}
	}
	if f.tokenFile != "" {
		toks, err := readTokenFile(f.tokenFile)
		if err != nil {
			return o, err
		}
		o.Tokens = toks
	}
	return o, nil
}

// readTokenFile reads "device_id token" lines; blank lines and lines
// starting with # are skipped.
func readTokenFile(path string) (map[string]string, error) {
	fh, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("token file: %w", err)
	}
	defer fh.Close()
	toks := map[string]string{}
	sc := bufio.NewScanner(fh)
	for line := 1; sc.Scan(); line++ {
		t := strings.TrimSpace(sc.Text())
		if t == "" || strings.HasPrefix(t, "#") {
			continue
		}
		fields := strings.Fields(t)
		if len(fields) != 2 {
			return nil, fmt.Errorf("token file %s line %d: %d fields, want \"device_id token\"", path, line, len(fields))
		}
		toks[fields[0]] = fields[1]
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("token file %s: %w", path, err)
	}
	return toks, nil
}

func writeJSONLine(s stdio, v any) error {
	b, err := json.Marshal(v)
	if err != nil {
		return err
	}
	_, err = fmt.Fprintf(s.out, "%s\n", b)
	return err
}

// startCPUProfile writes a CPU profile to path until stop is called.
func startCPUProfile(path string) (stop func(), err error) {
	fh, err := os.Create(path)
	if err != nil {
		return nil, fmt.Errorf("cpu profile: %w", err)
	}
	if err := pprof.StartCPUProfile(fh); err != nil {
		fh.Close()
		return nil, fmt.Errorf("cpu profile: %w", err)
	}
	return func() { pprof.StopCPUProfile(); fh.Close() }, nil
}
