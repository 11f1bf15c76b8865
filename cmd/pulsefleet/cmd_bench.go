package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"os"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim/bench"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

func init() {
	register(command{
		name: "bench",
		summary: `Measure ingest under load: the same simulated raw fleet against a bare sink
(decode and acknowledge only) and then against the full gateway with a
temporary store, in one run. Progress goes to stderr; the last line on stdout
is one JSON object with sink_samples_per_s, gateway_samples_per_s, ratio
(gateway / sink), cpu_ratio (the gateway's CPU per acknowledged sample over
the sink's), ack_p50_ms, ack_p99_ms (gateway phase), lost (acknowledged
samples missing from the store afterwards), sink_saturated (the bare sink
acknowledged less than 95 % of the offered load: the machine was the limit,
so the run's latency and CPU figures say little), peak_rss_bytes and more.
Peak RSS is measured per phase (the kernel's high-water mark is reset at the
start of each phase); with --client process (the default) the load client
runs as a separate 'pulsefleet sim' process, so the peaks are the targets'
own, and the client's are reported apart.`,
		run: runBench,
	})
}

func runBench(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("bench", "--devices N --rate HZ --duration DUR [--chunk N] [--client process|in-process] [--cpuprofile PREFIX]", s.err)
	var f simFlags
	f.register(fs, false)
	client := fs.String("client", "process", "run the load client as a separate process (process) or inside this one (in-process)")
	cpuProfile := fs.String("cpuprofile", "", "write CPU profiles (pprof) per phase to PREFIX.PHASE.pprof (and the client's to PREFIX.client-N.pprof)")
	memProfile := fs.String("memprofile", "", "write a heap profile (pprof) per phase at 90 % of its sending time to PREFIX.PHASE.pprof")
	batchDelay := fs.Duration("batch-delay", defaultServeConfig().BatchDelay, "the gateway's store batch delay")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	set := map[string]bool{}
	fs.Visit(func(fl *flag.Flag) { set[fl.Name] = true })
	switch {
	case f.devices < 1 || f.devices > 100000:
		return usagef("--devices %d, want 1..100000", f.devices)
	case f.rate < 25 || f.rate > 1000:
		return usagef("--rate %v Hz, want 25..1000", f.rate)
	case f.chunk < 1 || f.chunk > 1000:
		return usagef("--chunk %d samples, want 1..1000", f.chunk)
	case f.duration <= 0:
		return usagef("--duration %v, want more than 0", f.duration)
	case f.perConn < 1:
		return usagef("--devices-per-conn %d, want 1 or more", f.perConn)
	case f.progress <= 0:
		return usagef("--progress-every %v, want more than 0", f.progress)
	case *client != "process" && *client != "in-process":
		return usagef("--client %q, want process or in-process", *client)
	case *batchDelay < time.Millisecond || *batchDelay > 2*time.Second:
		return usagef("--batch-delay %v, want 1ms..2s", *batchDelay)
	}
	opts := bench.Options{Devices: f.devices, RateHz: f.rate, Chunk: f.chunk, Duration: f.duration, Seed: f.seed,
		DevicesPerConn: f.perConn, Progress: s.err, ProgressEvery: f.progress, CPUProfile: *cpuProfile, MemProfile: *memProfile}
	if *client == "process" {
		exe, err := os.Executable()
		if err != nil {
			return fmt.Errorf("find this binary to run the client: %w (use --client in-process)", err)
		}
		opts.Client = bench.ExecClient(exe, s.err, *cpuProfile)
	}
	res, err := bench.Run(ctx, opts, bench.SinkPhase(), gatewayPhase(*batchDelay, s.err))
	if err != nil {
		return err
	}
	return writeJSONLine(s, res)
}

// gatewayPhase runs the full gateway, wired as `serve` wires it, on a
// temporary data directory and loopback addresses.
func gatewayPhase(batchDelay time.Duration, logw io.Writer) bench.Phase {
	return bench.Phase{Name: "gateway", Start: func(ctx context.Context) (bench.Target, error) {
		dir, err := os.MkdirTemp("", "pulsefleet-bench-")
		if err != nil {
			return nil, err
		}
		c := defaultServeConfig()
		c.Data, c.GRPCListen, c.HTTPListen, c.LogLevel, c.BatchDelay = dir, "127.0.0.1:0", "127.0.0.1:0", "warn", batchDelay
		rg, stop, err := startGateway(ctx, c, logw)
		if err != nil {
			os.RemoveAll(dir)
			return nil, err
		}
		return &gatewayTarget{addr: rg.GRPCAddr, dir: dir, stop: stop, db: rg.DB}, nil
	}}
}

type gatewayTarget struct {
	addr, dir string
	stop      func() error
	db        *store.DB
}

func (g *gatewayTarget) Addr() string { return g.addr }

// Commits counts the gateway's store commits (bench.Committer).
func (g *gatewayTarget) Commits() uint64 { return g.db.Commits() }

// Stop shuts the gateway down (flushing the store) and counts the raw
// samples of the ingest ledger per device: what the store holds durably.
func (g *gatewayTarget) Stop(context.Context) (map[string]uint64, error) {
	defer os.RemoveAll(g.dir)
	if err := g.stop(); err != nil {
		return nil, fmt.Errorf("stop gateway: %w", err)
	}
	db, err := store.Open(g.dir, store.Options{})
	if err != nil {
		return nil, err
	}
	defer db.Close()
	totals, err := db.LedgerTotals()
	if err != nil {
		return nil, err
	}
	held := make(map[string]uint64, len(totals))
	for id, t := range totals {
		if !t.Distinct {
			return nil, fmt.Errorf("store holds a sequence number of %s twice", id)
		}
		held[id] = t.Samples
	}
	return held, nil
}
