package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"strings"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/profiles"
	"github.com/pulsefleet/pulsefleet/internal/scenarios"
	"github.com/pulsefleet/pulsefleet/internal/sim"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "demo",
		summary: `Run a gateway and a simulated pilot fleet in one process on embedded defaults:
a temporary data directory, loopback addresses chosen automatically, and the
'demo' scenario (eight beds of a fictional ward; a desaturation alarm is
announced within about a minute). Prints where the web page, metrics and gRPC
are, and each alarm announcement. Ctrl-C stops it cleanly and removes the
temporary data.`,
		run: runDemo,
	})
}

func runDemo(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("demo", "[--scenario NAME|FILE] [--speed N] [--data DIR]", s.err)
	scen := fs.String("scenario", "demo", "the fleet: a shipped scenario or a scenario file (docs/scenarios.md)")
	speed := fs.Float64("speed", 0, "time compression, scenario seconds per wall second (default: the scenario's)")
	data := fs.String("data", "", "data directory to keep (default: a temporary one, removed at exit)")
	grpcListen := fs.String("grpc-listen", "127.0.0.1:0", "gRPC listen address (port 0 = chosen automatically)")
	httpListen := fs.String("http-listen", "127.0.0.1:0", "HTTP listen address (port 0 = chosen automatically)")
	seed := fs.Uint64("seed", 1, "seed of the simulated patients")
	profile := fs.String("profile", "", "default alarm profile: a built-in name ("+strings.Join(profiles.Names(), ", ")+") or a YAML file (default: serve's default)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *speed != 0 && (*speed < 0.01 || *speed > 100000) {
		return usagef("--speed %v, want 0.01..100000", *speed)
	}
	sc, err := scenarios.Load(*scen)
	if err != nil {
		return err
	}
	fmt.Fprintln(s.out, notCertified)

	c, err := demoServeConfig(sc.Speed, *speed, *grpcListen, *httpListen, *profile)
	if err != nil {
		return err
	}
	if *data == "" {
		dir, err := os.MkdirTemp("", "pulsefleet-demo-")
		if err != nil {
			return err
		}
		defer os.RemoveAll(dir)
		c.Data = dir
	} else {
		c.Data = *data
	}
	rg, stopGateway, err := startGateway(ctx, c, s.err)
	if err != nil {
		return err
	}
	out := &lockedWriter{w: s.out}
	fmt.Fprintf(out, "\npulsefleet demo: a gateway and %d simulated devices (scenario %q, invented patients)\n"+
		"  web page: http://%s/\n  metrics:  http://%s/metrics\n  gRPC:     %s   (try: pulsefleet devices --gateway %s)\n  data:     %s\n"+
		"Press Ctrl-C to stop.\n\n", len(sc.Devices), sc.Name, rg.HTTPAddr, rg.HTTPAddr, rg.GRPCAddr, rg.GRPCAddr, c.Data)

	runCtx, stop := context.WithCancel(ctx)
	defer stop()
	var wg sync.WaitGroup
	var simErr error
	wg.Add(2)
	go func() {
		defer wg.Done()
		_, simErr = sim.Run(runCtx, sim.Options{Gateway: rg.GRPCAddr, Scenario: sc, Speed: *speed, Seed: *seed,
			Progress: nil, Drain: -1})
	}()
	go func() {
		defer wg.Done()
		watchDemo(runCtx, rg.GRPCAddr, len(sc.Devices), out, s.err)
	}()
	<-ctx.Done()
	fmt.Fprintln(s.err, "pulsefleet demo: stopping (flushing the store)...")
	stop()
	wg.Wait()
	err = stopGateway()
	if simErr != nil && err == nil {
		err = simErr
	}
	if err == nil {
		fmt.Fprintln(out, "pulsefleet demo: stopped.")
	}
	return err
}

// demoServeConfig is the demo gateway's configuration: serve's defaults on
// the given addresses, quiet logs, and room for the scenario's speed.
func demoServeConfig(scenarioSpeed, speed float64, grpcListen, httpListen, profile string) (serveConfig, error) {
	c := defaultServeConfig()
	c.GRPCListen, c.HTTPListen, c.LogLevel = grpcListen, httpListen, "warn"
	// A compressed scenario sends device time faster than real time: let
	// the demo's gateway take it (with room for resends after a reconnect).
	sp := speed
	if sp == 0 {
		sp = scenarioSpeed
	}
	c.DeviceTimeRate = max(c.DeviceTimeRate, 2*sp)
	if profile != "" {
		c.Profile = profile
	}
	if err := c.validate(); err != nil {
		return c, usageError{err.Error()}
	}
	return c, nil
}

// watchDemo prints the fleet once it is live and every alarm announcement
// (and escalation) until ctx ends.
func watchDemo(ctx context.Context, addr string, want int, out, errw io.Writer) {
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		fmt.Fprintf(errw, "pulsefleet demo: watch: %v\n", err)
		return
	}
	defer conn.Close()
	fleet := pb.NewFleetServiceClient(conn)
	var wg sync.WaitGroup
	defer wg.Wait()
	wg.Add(1)
	go func() {
		defer wg.Done()
		t := time.NewTicker(time.Second)
		defer t.Stop()
		start := time.Now()
		for {
			select {
			case <-ctx.Done():
				return
			case <-t.C:
			}
			resp, err := fleet.ListDevices(ctx, &pb.ListDevicesRequest{})
			if err != nil {
				continue
			}
			n := 0
			for _, d := range resp.GetDevices() {
				if d.GetConnected() && d.GetLatest() != nil {
					n++
				}
			}
			if n >= want || n > 0 && time.Since(start) > 15*time.Second {
				fmt.Fprintf(out, "%s  live: %d of %d devices streaming with values\n", time.Now().Format("15:04:05"), n, want)
				return
			}
		}
	}()
	for ctx.Err() == nil {
		st, err := fleet.WatchEpisodes(ctx, &pb.WatchEpisodesRequest{})
		if err == nil {
			for {
				m, err := st.Recv()
				if err != nil {
					break
				}
				ev := m.GetEvent()
				switch ev.GetTransition() {
				case "announced", "escalated":
					e := ev.GetEpisode()
					low := ""
					if e.MinSpo2Pct != nil {
						low = fmt.Sprintf(", lowest SpO2 %.0f %%", e.GetMinSpo2Pct())
					}
					fmt.Fprintf(out, "%s  alarm %s: %s %s, %s priority%s\n", time.Now().Format("15:04:05"),
						ev.GetTransition(), e.GetDeviceId(), e.GetCondition(), priorityName(e.GetPriority()), low)
				}
			}
		}
		select {
		case <-ctx.Done():
		case <-time.After(time.Second):
		}
	}
}

func priorityName(p pb.Priority) string {
	switch p {
	case pb.Priority_PRIORITY_HIGH:
		return "high"
	case pb.Priority_PRIORITY_MEDIUM:
		return "medium"
	case pb.Priority_PRIORITY_LOW:
		return "low"
	}
	return "no"
}

// lockedWriter serialises writes from several goroutines.
type lockedWriter struct {
	mu sync.Mutex
	w  io.Writer
}

func (l *lockedWriter) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.Write(p)
}
