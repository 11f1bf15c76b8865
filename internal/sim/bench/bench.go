// Package bench runs the same simulated load against several ingest
// targets in turn, a bare sink first (decode and acknowledge only, package
// internal/sim/sink) and then the system under test, and compares them: acknowledged
// samples per second, acknowledgement latency, acknowledged samples missing
// from the target afterwards, CPU and peak memory per phase.
//
// Memory: the peak resident set of each phase is measured by resetting the
// kernel's high-water mark (writing 5 to /proc/self/clear_refs, Linux 4.0+)
// after returning freed memory to the OS at the start of the phase, and
// reading VmHWM from /proc/self/status at its end. Where the reset is not
// allowed, VmRSS is sampled every 100 ms instead (which can miss short
// peaks). The load client runs in the same process, so a phase's peak
// includes the client's own memory: per-device figures are an upper bound
// for the target.
package bench

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"net"
	"os"
	"runtime"
	"runtime/debug"
	"runtime/pprof"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/sim/sink"
)

// Target is a running ingest service under load.
type Target interface {
	// Addr is its gRPC address.
	Addr() string
	// Stop shuts it down gracefully, releases its resources and reports
	// the raw samples it holds durably per device id.
	Stop(ctx context.Context) (held map[string]uint64, err error)
}

// Committer is a Target that counts its store commits (optional): the
// phase then reports commits per second of sending time.
type Committer interface {
	Commits() uint64
}

// StartFunc starts a target on a loopback address of its choosing.
type StartFunc func(ctx context.Context) (Target, error)

// Phase names a target to run the load against.
type Phase struct {
	Name  string
	Start StartFunc
}

// Options describe the load; zero values take the defaults stated.
type Options struct {
	Devices  int           // raw devices, 1..100000
	RateHz   float64       // samples per second per device; 0 = 100
	Chunk    int           // samples per chunk; 0 = 25
	Duration time.Duration // sending time per phase; required
	Seed     uint64
	// DevicesPerConn is how many devices share a gRPC connection; 0 = 500.
	DevicesPerConn int
	// Progress receives progress lines; nil = none. ProgressEvery 0 = 5 s.
	Progress      io.Writer
	ProgressEvery time.Duration
	// CPUProfile, when set, writes one CPU profile per phase to
	// CPUProfile.PHASE.pprof.
	CPUProfile string
	// MemProfile, when set, writes a heap profile of this process (the
	// target, plus the client when in process) at 90 % of each phase's
	// sending time to MemProfile.PHASE.pprof.
	MemProfile string
	// Client drives the load; nil = sim.Run in this process (the peak RSS
	// and CPU of a phase then include the client's). ExecClient runs it as
	// a separate process so the target's figures are its own.
	Client ClientFunc
}

// ClientFunc runs the simulated fleet o and reports it, with the client's
// own resource use when it ran as a separate process (zero otherwise).
type ClientFunc func(ctx context.Context, o sim.Options) (*sim.Report, ClientUsage, error)

// ClientUsage is what a separate client process used.
type ClientUsage struct {
	PeakRSSBytes int64
	CPU          time.Duration
}

func inProcess(ctx context.Context, o sim.Options) (*sim.Report, ClientUsage, error) {
	r, err := sim.Run(ctx, o)
	return r, ClientUsage{}, err
}

// PhaseResult is one phase's outcome.
type PhaseResult struct {
	Name         string
	Report       *sim.Report
	SamplesPerS  float64
	Lost         uint64  // acknowledged samples the target does not hold
	PeakRSSBytes int64   // peak resident set of this process during the phase
	RSSExact     bool    // true when the kernel high-water mark was reset for the phase
	CPUCores     float64 // this process's CPU time / wall time during sending
	// CPUNsPerSample is this process's CPU time during the phase per
	// acknowledged sample (unrounded; CPURatio compares it).
	CPUNsPerSample float64
	// CommitsPerS is the target's store commits per second of sending
	// time (0 when it does not count them: a Committer).
	CommitsPerS float64
	Client      ClientUsage
	ClientCores float64 // a separate client's CPU time / wall time
	// RSSAnonEnd and RSSFileEnd split this process's resident set when the
	// load ended (before the target stopped): anonymous memory (heap,
	// stacks) and file-backed pages (a memory-mapped store file).
	RSSAnonEnd, RSSFileEnd int64
}

// Result compares the phases; its JSON form is the bench command's line.
// Latency and loss figures are those of the last phase (the system under
// test); peak_rss_bytes is the highest phase peak.
type Result struct {
	Devices             int     `json:"devices"`
	RateHz              float64 `json:"rate_hz"`
	Chunk               int     `json:"chunk"`
	DurationS           float64 `json:"duration_s"`
	OfferedSamplesPerS  float64 `json:"offered_samples_per_s"`
	SinkSamplesPerS     float64 `json:"sink_samples_per_s"`
	GatewaySamplesPerS  float64 `json:"gateway_samples_per_s"`
	Ratio               float64 `json:"ratio"`
	AckP50Ms            float64 `json:"ack_p50_ms"`
	AckP99Ms            float64 `json:"ack_p99_ms"`
	SinkAckP99Ms        float64 `json:"sink_ack_p99_ms"`
	Lost                uint64  `json:"lost"`
	PeakRSSBytes        int64   `json:"peak_rss_bytes"`
	SinkPeakRSSBytes    int64   `json:"sink_peak_rss_bytes"`
	GatewayPeakRSSBytes int64   `json:"gateway_peak_rss_bytes"`
	RSSPerDeviceBytes   int64   `json:"rss_per_device_bytes"` // gateway phase peak / devices
	RSSExact            bool    `json:"rss_exact"`
	ClientInProcess     bool    `json:"client_in_process"` // peaks and CPU include the load client
	ClientPeakRSSBytes  int64   `json:"client_peak_rss_bytes,omitempty"`
	SinkCPUCores        float64 `json:"sink_cpu_cores"`
	GatewayCPUCores     float64 `json:"gateway_cpu_cores"`
	ClientCPUCores      float64 `json:"client_cpu_cores,omitempty"`
	// CPURatio is the gateway's CPU per acknowledged sample over the bare
	// sink's, both from this run: (gateway_cpu_cores /
	// gateway_samples_per_s) / (sink_cpu_cores / sink_samples_per_s); 0 when
	// either phase acknowledged nothing or used no measurable CPU.
	CPURatio float64 `json:"cpu_ratio"`
	// CommitsPerS is the gateway's store commits per second while the
	// load was sent: each commit costs about the same whatever it holds
	// (internal/ingest/writer.go, pacing), so it explains much of the CPU.
	CommitsPerS float64 `json:"commits_per_s"`
	// SinkSaturated is true when the bare sink acknowledged less than 95 %
	// of the offered samples/s: the machine (load client, other work), not
	// the system under test, was the limit, and the run's latency and CPU
	// figures say little about the gateway.
	SinkSaturated       bool   `json:"sink_saturated"`
	Rejected            uint64 `json:"rejected"`
	Reconnects          uint64 `json:"reconnects"`
	UnackedAtEnd        uint64 `json:"unacked_at_end"`
	GatewayRSSAnonBytes int64  `json:"gateway_rss_anon_bytes"` // at the end of the load: heap, stacks
	// AnonPerDeviceBytes is the gateway's anonymous memory per connected
	// stream (its own memory, without the mapped store file's page cache).
	AnonPerDeviceBytes  int64 `json:"anon_per_device_bytes"`
	GatewayRSSFileBytes int64 `json:"gateway_rss_file_bytes"` // at the end of the load: mapped files (the store)
	// LoadAvg is the machine's 1-minute load average at the start and the
	// end of the run (/proc/loadavg): other work on a shared machine skews
	// every figure above.
	LoadAvgStart float64       `json:"load_avg_start"`
	LoadAvgEnd   float64       `json:"load_avg_end"`
	CPUs         int           `json:"cpus"`
	Phases       []PhaseResult `json:"-"`
}

// SinkPhase is the bare sink.
func SinkPhase() Phase {
	return Phase{Name: "sink", Start: func(ctx context.Context) (Target, error) {
		lis, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			return nil, fmt.Errorf("listen: %w", err)
		}
		return sinkTarget{sink.Start(lis, sink.Options{})}, nil
	}}
}

type sinkTarget struct{ r *sink.Running }

func (s sinkTarget) Addr() string { return s.r.Addr() }
func (s sinkTarget) Stop(context.Context) (map[string]uint64, error) {
	err := s.r.Stop(5 * time.Second)
	out := map[string]uint64{}
	for _, id := range s.r.DeviceIDs() {
		d, _ := s.r.Device(id)
		out[id] = d.Samples
	}
	return out, err
}

// Run runs the load against each phase in order (normally the sink, then
// the gateway) and compares the first with the last.
func Run(ctx context.Context, opts Options, phases ...Phase) (*Result, error) {
	if opts.Devices < 1 || opts.Devices > 100000 {
		return nil, fmt.Errorf("devices: %d, want 1..100000", opts.Devices)
	}
	if opts.Duration <= 0 {
		return nil, fmt.Errorf("duration: %v, want more than 0", opts.Duration)
	}
	if len(phases) == 0 {
		return nil, errors.New("no phases")
	}
	if opts.RateHz == 0 {
		opts.RateHz = 100
	}
	if opts.Chunk == 0 {
		opts.Chunk = 25
	}
	res := &Result{Devices: opts.Devices, RateHz: opts.RateHz, Chunk: opts.Chunk, DurationS: opts.Duration.Seconds(),
		OfferedSamplesPerS: float64(opts.Devices) * opts.RateHz, RSSExact: true, ClientInProcess: opts.Client == nil}
	if opts.Client == nil {
		opts.Client = inProcess
	}
	res.LoadAvgStart, res.CPUs = loadAvg(), runtime.NumCPU()
	for _, ph := range phases {
		pr, err := runPhase(ctx, opts, ph)
		if err != nil {
			return nil, fmt.Errorf("phase %s: %w", ph.Name, err)
		}
		res.Phases = append(res.Phases, *pr)
		res.RSSExact = res.RSSExact && pr.RSSExact
		res.PeakRSSBytes = max(res.PeakRSSBytes, pr.PeakRSSBytes)
		if ctx.Err() != nil {
			return nil, ctx.Err()
		}
	}
	res.LoadAvgEnd = loadAvg()
	first, last := res.Phases[0], res.Phases[len(res.Phases)-1]
	res.SinkSamplesPerS, res.GatewaySamplesPerS = first.SamplesPerS, last.SamplesPerS
	if first.SamplesPerS > 0 {
		res.Ratio = math.Round(last.SamplesPerS/first.SamplesPerS*1000) / 1000
	}
	res.AckP50Ms, res.AckP99Ms = last.Report.AckP50Ms, last.Report.AckP99Ms
	res.SinkAckP99Ms = first.Report.AckP99Ms
	res.Lost = last.Lost
	res.SinkPeakRSSBytes, res.GatewayPeakRSSBytes = first.PeakRSSBytes, last.PeakRSSBytes
	res.RSSPerDeviceBytes = last.PeakRSSBytes / int64(opts.Devices)
	res.GatewayRSSAnonBytes, res.GatewayRSSFileBytes = last.RSSAnonEnd, last.RSSFileEnd
	res.AnonPerDeviceBytes = last.RSSAnonEnd / int64(opts.Devices)
	res.SinkCPUCores, res.GatewayCPUCores = first.CPUCores, last.CPUCores
	res.ClientPeakRSSBytes, res.ClientCPUCores = last.Client.PeakRSSBytes, last.ClientCores
	res.CPURatio = cpuRatio(first, last)
	res.CommitsPerS = last.CommitsPerS
	res.SinkSaturated = saturated(first.SamplesPerS, res.OfferedSamplesPerS)
	res.Rejected, res.Reconnects, res.UnackedAtEnd = last.Report.Rejected, last.Report.Reconnects, last.Report.UnackedAtEnd
	return res, nil
}

// saturated reports a sink that acknowledged less than 95 % of the offered
// samples/s (Result.SinkSaturated).
func saturated(sinkPerS, offeredPerS float64) bool { return sinkPerS < 0.95*offeredPerS }

// cpuRatio is the CPU per acknowledged sample of phase b over phase a's
// (Result.CPURatio), to three decimals.
func cpuRatio(a, b PhaseResult) float64 {
	if a.CPUNsPerSample <= 0 || b.CPUNsPerSample <= 0 {
		return 0
	}
	return math.Round(b.CPUNsPerSample/a.CPUNsPerSample*1000) / 1000
}

// startCPUProfile starts the CPU profile of the phase when opts ask for one
// (else it returns nil); the caller stops it and closes the file.
func startCPUProfile(opts Options, phase string) (*os.File, error) {
	if opts.CPUProfile == "" {
		return nil, nil
	}
	prof, err := os.Create(opts.CPUProfile + "." + phase + ".pprof")
	if err != nil {
		return nil, fmt.Errorf("cpu profile: %w", err)
	}
	if err := pprof.StartCPUProfile(prof); err != nil {
		prof.Close()
		return nil, fmt.Errorf("cpu profile: %w", err)
	}
	return prof, nil
}

// scheduleHeapProfile writes the phase's heap profile at 9/10 of its
// duration when opts ask for one; cancel stops it if it has not run yet.
func scheduleHeapProfile(opts Options, phase string) (cancel func()) {
	if opts.MemProfile == "" {
		return func() {}
	}
	heapDone := make(chan struct{})
	t := time.NewTimer(opts.Duration * 9 / 10)
	path := opts.MemProfile + "." + phase + ".pprof"
	go func() {
		select {
		case <-heapDone:
		case <-t.C:
			if fh, err := os.Create(path); err == nil {
				pprof.Lookup("heap").WriteTo(fh, 0)
				fh.Close()
			}
		}
	}()
	return func() {
		t.Stop()
		close(heapDone)
	}
}

// runPhase starts the phase's target, drives the load client against it
// for opts.Duration, and measures throughput, CPU, memory and loss.
func runPhase(ctx context.Context, opts Options, ph Phase) (*PhaseResult, error) {
	runtime.GC()
	debug.FreeOSMemory()
	peak := startPeak()
	defer peak.stop()

	tgt, err := ph.Start(ctx)
	if err != nil {
		return nil, err
	}
	stopped := false
	defer func() {
		if !stopped {
			tgt.Stop(context.WithoutCancel(ctx))
		}
	}()
	if opts.Progress != nil {
		fmt.Fprintf(opts.Progress, "bench: phase %s: %d devices x %g Hz in %d-sample chunks for %v against %s\n",
			ph.Name, opts.Devices, opts.RateHz, opts.Chunk, opts.Duration, tgt.Addr())
	}
	prof, err := startCPUProfile(opts, ph.Name)
	if err != nil {
		return nil, err
	}
	stopHeap := scheduleHeapProfile(opts, ph.Name)
	defer stopHeap()
	commits := func() uint64 { return 0 }
	if c, ok := tgt.(Committer); ok {
		commits = c.Commits
	}
	cpu0, wall0, commits0 := cpuTime(), time.Now(), commits()
	rep, usage, err := opts.Client(ctx, sim.Options{
		Gateway: tgt.Addr(), Devices: opts.Devices, IDPrefix: "bench", Mode: sim.ModeRaw,
		RateHz: opts.RateHz, Chunk: opts.Chunk, Duration: opts.Duration, Seed: opts.Seed,
		Progress: opts.Progress, ProgressEvery: opts.ProgressEvery, DevicesPerConn: opts.DevicesPerConn,
		Drain: max(10*time.Second, opts.Duration),
	})
	cpu1, wall1, commits1 := cpuTime(), time.Now(), commits()
	anon, file := procStatus("RssAnon"), procStatus("RssFile")
	if prof != nil {
		pprof.StopCPUProfile()
		prof.Close()
	}
	if err != nil {
		return nil, err
	}
	pr := &PhaseResult{Name: ph.Name, Report: rep, SamplesPerS: rep.SamplesPerS, Client: usage, RSSAnonEnd: anon, RSSFileEnd: file}
	if w := wall1.Sub(wall0).Seconds(); w > 0 {
		pr.CPUCores = math.Round((cpu1-cpu0).Seconds()/w*100) / 100
		pr.ClientCores = math.Round(usage.CPU.Seconds()/w*100) / 100
		pr.CommitsPerS = math.Round(float64(commits1-commits0)/w*10) / 10
	}
	if n := rep.SamplesAcked; n > 0 {
		pr.CPUNsPerSample = float64(cpu1-cpu0) / float64(n)
	}
	stopped = true
	held, err := tgt.Stop(context.WithoutCancel(ctx))
	if err != nil {
		return nil, fmt.Errorf("stop and count durable samples: %w", err)
	}
	for id, d := range rep.PerDevice {
		if h := held[id]; h < d.SamplesAcked {
			pr.Lost += d.SamplesAcked - h
		}
	}
	pr.PeakRSSBytes, pr.RSSExact = peak.stop()
	if opts.Progress != nil {
		fmt.Fprintf(opts.Progress, "bench: phase %s: %.0f samples/s acknowledged, ack p50 %.1f ms p99 %.1f ms, lost %d, peak RSS %d MiB, %.2f cores (client: %d MiB, %.2f cores)\n",
			ph.Name, pr.SamplesPerS, rep.AckP50Ms, rep.AckP99Ms, pr.Lost, pr.PeakRSSBytes>>20, pr.CPUCores, usage.PeakRSSBytes>>20, pr.ClientCores)
	}
	return pr, nil
}

func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// peakMeter measures a phase's peak resident set.
type peakMeter struct {
	exact bool
	once  sync.Once
	done  chan struct{}
	wg    sync.WaitGroup
	max   int64
	mu    sync.Mutex
	res   int64
}

func startPeak() *peakMeter {
	p := &peakMeter{done: make(chan struct{})}
	if err := os.WriteFile("/proc/self/clear_refs", []byte("5"), 0); err == nil {
		p.exact = true
		return p
	}
	p.wg.Add(1)
	go func() {
		defer p.wg.Done()
		t := time.NewTicker(100 * time.Millisecond)
		defer t.Stop()
		for {
			if v := procStatus("VmRSS"); v > 0 {
				p.mu.Lock()
				p.max = max(p.max, v)
				p.mu.Unlock()
			}
			select {
			case <-p.done:
				return
			case <-t.C:
			}
		}
	}()
	return p
}

// stop ends the measurement (idempotent) and returns the peak.
func (p *peakMeter) stop() (int64, bool) {
	p.once.Do(func() {
		close(p.done)
		p.wg.Wait()
		if p.exact {
			p.res = procStatus("VmHWM")
		} else {
			p.mu.Lock()
			p.res = max(p.max, procStatus("VmRSS"))
			p.mu.Unlock()
		}
	})
	return p.res, p.exact
}

// procStatus reads a "kB" field of /proc/self/status in bytes (0 if absent).
func procStatus(key string) int64 {
	b, err := os.ReadFile("/proc/self/status")
	if err != nil {
		return 0
	}
	for _, line := range strings.Split(string(b), "\n") {
		if v, ok := strings.CutPrefix(line, key+":"); ok {
			f := strings.Fields(v)
			if len(f) > 0 {
				n, _ := strconv.ParseInt(f[0], 10, 64)
				return n * 1024
			}
		}
	}
	return 0
}

// loadAvg is the 1-minute load average (0 when unknown).
func loadAvg() float64 {
	b, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return 0
	}
	f := strings.Fields(string(b))
	if len(f) == 0 {
		return 0
	}
	v, _ := strconv.ParseFloat(f[0], 64)
	return v
}
