package bench

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim"
)

// ExecClient runs the load as a separate process: `EXE sim --gateway ...
// --per-device-out FILE`, reading its final JSON line and per-device counts.
// Its progress lines go to progress (nil = discarded). Only the options a
// bench sets are passed: gateway, devices, id prefix, mode, rate, chunk,
// duration, seed and progress interval. With cpuProfile set, the client
// writes its CPU profile to cpuProfile.client-N.pprof (N counts the runs).
func ExecClient(exe string, progress io.Writer, cpuProfile string) ClientFunc {
	runs := 0
	return func(ctx context.Context, o sim.Options) (*sim.Report, ClientUsage, error) {
		dir, err := os.MkdirTemp("", "pulsefleet-bench-client-")
		if err != nil {
			return nil, ClientUsage{}, err
		}
		defer os.RemoveAll(dir)
		perDev := filepath.Join(dir, "per-device.csv")
		every := o.ProgressEvery
		if every == 0 {
			every = 5 * time.Second
		}
		args := []string{"sim", "--gateway", o.Gateway, "--devices", strconv.Itoa(o.Devices),
			"--id-prefix", o.IDPrefix, "--mode", string(o.Mode),
			"--rate", strconv.FormatFloat(o.RateHz, 'g', -1, 64), "--chunk", strconv.Itoa(o.Chunk),
			"--duration", o.Duration.String(), "--seed", strconv.FormatUint(o.Seed, 10),
			"--progress-every", every.String(), "--per-device-out", perDev}
		if o.Drain != 0 {
			args = append(args, "--drain", o.Drain.String())
		}
		if o.DevicesPerConn > 0 {
			args = append(args, "--devices-per-conn", strconv.Itoa(o.DevicesPerConn))
		}
		runs++
		if cpuProfile != "" {
			args = append(args, "--cpuprofile", fmt.Sprintf("%s.client-%d.pprof", cpuProfile, runs))
		}
		cmd := exec.CommandContext(ctx, exe, args...)
		var out bytes.Buffer
		cmd.Stdout = &out
		if progress != nil {
			cmd.Stderr = progress
		}
		cmd.Cancel = func() error { return cmd.Process.Signal(os.Interrupt) }
		cmd.WaitDelay = 30 * time.Second
		runErr := cmd.Run()
		var usage ClientUsage
		if ps := cmd.ProcessState; ps != nil {
			if ru, ok := ps.SysUsage().(*syscall.Rusage); ok {
				usage.PeakRSSBytes = ru.Maxrss * 1024 // kilobytes on Linux
				usage.CPU = time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
			}
		}
		if runErr != nil {
			return nil, usage, fmt.Errorf("client %s: %w", exe, runErr)
		}
		lines := strings.Split(strings.TrimSpace(out.String()), "\n")
		rep := &sim.Report{}
		if err := json.Unmarshal([]byte(lines[len(lines)-1]), rep); err != nil {
			return nil, usage, fmt.Errorf("client report: %w", err)
		}
		rep.PerDevice, err = readPerDevice(perDev)
		if err != nil {
			return nil, usage, err
		}
		return rep, usage, nil
	}
}

func readPerDevice(path string) (map[string]sim.DeviceReport, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("client per-device counts: %w", err)
	}
	defer f.Close()
	out := map[string]sim.DeviceReport{}
	sc := bufio.NewScanner(f)
	for line := 1; sc.Scan(); line++ {
		if line == 1 {
			continue // header
		}
		c := strings.Split(sc.Text(), ",")
		if len(c) != 5 {
			return nil, fmt.Errorf("client per-device counts line %d: %d columns, want 5", line, len(c))
		}
		var d sim.DeviceReport
		var e1, e2, e3 error
		d.Mode = sim.Mode(c[1])
		d.FramesAcked, e1 = strconv.ParseUint(c[2], 10, 64)
		d.SamplesAcked, e2 = strconv.ParseUint(c[3], 10, 64)
		d.AckedThrough, e3 = strconv.ParseUint(c[4], 10, 64)
		if e1 != nil || e2 != nil || e3 != nil {
			return nil, fmt.Errorf("client per-device counts line %d: %q", line, sc.Text())
		}
		out[c[0]] = d
	}
	return out, sc.Err()
}
