package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/creack/pty"
	"golang.org/x/term"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// serialLink is a pseudo-terminal standing in for a board's USB serial
// port. The relay opens Path, a symlink to the terminal side (as udev's
// /dev/serial/by-id names are); Replug closes the pair (the cable is
// pulled) and points Path at a new one.
type serialLink struct {
	t    *testing.T
	Path string
	mu   sync.Mutex
	ptmx *os.File
	tty  *os.File
}

func newSerialLink(t *testing.T) *serialLink {
	l := &serialLink{t: t, Path: filepath.Join(t.TempDir(), "ttyPROTO")}
	l.plug()
	t.Cleanup(l.unplug)
	return l
}

func (l *serialLink) plug() {
	ptmx, tty, err := pty.Open()
	if err != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" { // CI: a pty is required, never skipped
			l.t.Fatalf("no pseudo-terminal (PULSEFLEET_REQUIRE_TOOLS is set): %v", err)
		}
		l.t.Skipf("no pseudo-terminal here: %v", err)
	}
	// Raw from the start: no echo back to the writer, no line editing.
	if _, err := term.MakeRaw(int(tty.Fd())); err != nil {
		l.t.Fatal(err)
	}
	os.Remove(l.Path)
	if err := os.Symlink(tty.Name(), l.Path); err != nil {
		l.t.Fatal(err)
	}
	l.mu.Lock()
	l.ptmx, l.tty = ptmx, tty
	l.mu.Unlock()
}

func (l *serialLink) unplug() {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.ptmx != nil {
		l.ptmx.Close()
		l.tty.Close()
		l.ptmx, l.tty = nil, nil
	}
}

// Replug pulls the cable, waits, and plugs a new one in.
func (l *serialLink) Replug(after time.Duration) {
	l.unplug()
	time.Sleep(after)
	l.plug()
}

// emit writes lines at rateHz, paced by an absolute schedule (a stall of
// the test machine is caught up, as a device's UART keeps its own clock).
func (l *serialLink) emit(ctx context.Context, lines []string, rateHz float64) error {
	start := time.Now()
	i := 0
	for i < len(lines) {
		due := int(time.Since(start).Seconds()*rateHz) + 1
		var b bytes.Buffer
		for ; i < len(lines) && i < due; i++ {
			b.WriteString(lines[i])
			b.WriteString("\r\n") // as a board's println prints
		}
		l.mu.Lock()
		w := l.ptmx
		l.mu.Unlock()
		if _, err := w.Write(b.Bytes()); err != nil {
			return err
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(20 * time.Millisecond):
		}
	}
	return nil
}

// relayInBackground runs the relay command in-process until ctx ends.
type relayResult struct {
	code   int
	rep    relayReport
	stderr string
}

func relayInBackground(t *testing.T, ctx context.Context, args ...string) <-chan relayResult {
	done := make(chan relayResult, 1)
	go func() {
		code, rep, stderr := relayCmd(t, ctx, "", args...)
		done <- relayResult{code, rep, stderr}
	}()
	return done
}

// The first acceptance test: a physical-model recording printed at
// 100 Hz on a serial port (a pseudo-terminal) as text lines; the relay
// streams it; the gateway's trend for the device has SpO2 on at least 95 %
// of the settled seconds (the bound) and equals, second for second,
// what the estimate command computes from the same lines.
func TestRelaySerialPortTrendEqualsEstimate(t *testing.T) {
	if testing.Short() {
		t.Skip("streams 40 s in real time")
	}
	const seconds, rate = 40, 100.0
	lines := ppgLines(seconds, rate, 18, 11, false)
	link := newSerialLink(t)
	addr, dir, stop := startTestGateway(t)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	res := relayInBackground(t, ctx, "--gateway", addr, "--device", "relay-pty", "--model", "proto-t",
		"--serial", link.Path, "--baud", "115200", "--rate", "100", "--adc-bits", "18")
	time.Sleep(300 * time.Millisecond) // the relay opens the port
	if err := link.emit(ctx, lines, rate); err != nil {
		t.Fatal(err)
	}
	time.Sleep(time.Second) // the last chunk goes out within 250 ms
	cancel()
	r := <-res
	t.Logf("%+v", r.rep)
	if r.code != 0 {
		t.Fatalf("relay exit %d; stderr:\n%s", r.code, r.stderr)
	}
	if r.rep.LinesRead != uint64(len(lines)) || r.rep.SamplesAcked != uint64(len(lines)) {
		t.Fatalf("read %d, acknowledged %d, want %d each; stderr:\n%s", r.rep.LinesRead, r.rep.SamplesAcked, len(lines), r.stderr)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	trend := storedTrend(t, dir, "relay-pty")

	var est bytes.Buffer
	code := run(context.Background(), []string{"estimate", "--rate", "100", "--adc-bits", "18"},
		stdio{in: strings.NewReader("red,ir\n" + strings.Join(lines, "\n") + "\n"), out: &est, err: io.Discard})
	if code != 0 {
		t.Fatalf("estimate exit %d", code)
	}
	cr := csv.NewReader(&est)
	cr.Comment = '#' // the caution line atop pulsefleet's CSV output
	rows, err := cr.ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	rows = rows[1:]
	if len(trend) != len(rows) || len(rows) != seconds {
		t.Fatalf("gateway trend has %d points, estimate %d rows, want %d", len(trend), len(rows), seconds)
	}
	settled, valid := 0, 0
	for i, row := range rows {
		p := trend[i]
		if i > 0 && p.TimeMS-trend[i-1].TimeMS != 1000 {
			t.Errorf("point %d: %d ms after the previous, want 1000 (one run, no restart)", i, p.TimeMS-trend[i-1].TimeMS)
		}
		for j, v := range []struct {
			name string
			got  float64
			prec float64
		}{{"spo2", p.SpO2, 0.05 + store.TrendResolution.SpO2/2}, {"pulse", p.Pulse, 0.05 + store.TrendResolution.Pulse/2},
			{"pi", p.PI, 0.0005 + store.TrendResolution.PI/2}, {"sqi", p.SQI, 0.005 + store.TrendResolution.SQI/2}} {
			// The estimate prints rounded values; the store keeps them at
			// its resolution: both roundings are allowed for.
			cell := row[j+1]
			if cell == "" {
				if !math.IsNaN(v.got) {
					t.Errorf("second %d %s: gateway %v, estimate none", i, v.name, v.got)
				}
				continue
			}
			want, _ := strconv.ParseFloat(cell, 64)
			if math.IsNaN(v.got) || math.Abs(v.got-want) > v.prec {
				t.Errorf("second %d %s: gateway %v, estimate %v", i, v.name, v.got, want)
			}
		}
		// Settled: past the estimator's default 8 s averaging window and a
		// beat or two (team choice: 10 s).
		if i >= 10 {
			settled++
			if !math.IsNaN(p.SpO2) {
				valid++
			}
		}
	}
	if float64(valid) < 0.95*float64(settled) {
		t.Errorf("SpO2 on %d of %d settled seconds, want >= 95 %% (issue 17)", valid, settled)
	}
}

// storedTrend reads a device's trend from a stopped gateway's store.
func storedTrend(t *testing.T, dir, device string) []store.Point {
	t.Helper()
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	var pts []store.Point
	if err := db.Trend(device, 0, math.MaxInt64, func(p store.Point) bool { pts = append(pts, p); return true }); err != nil {
		t.Fatal(err)
	}
	return pts
}

// The cable is pulled: the pseudo-terminal closes, and a new one appears
// under the same name a second later. The relay says so, reopens the port
// and goes on; every line written is acknowledged.
func TestRelaySerialPortReopensAfterCablePull(t *testing.T) {
	if testing.Short() {
		t.Skip("streams in real time")
	}
	before, after := ppgLines(8, 100, 18, 3, false), ppgLines(8, 100, 18, 4, false)
	link := newSerialLink(t)
	addr, dir, stop := startTestGateway(t)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	res := relayInBackground(t, ctx, "--gateway", addr, "--device", "relay-replug", "--model", "proto-t",
		"--serial", link.Path, "--rate", "100", "--adc-bits", "18")
	time.Sleep(300 * time.Millisecond)
	if err := link.emit(ctx, before, 100); err != nil {
		t.Fatal(err)
	}
	time.Sleep(500 * time.Millisecond) // the relay has read everything before the pull
	link.Replug(time.Second)
	time.Sleep(time.Second) // the relay retries every 0.5 s
	if err := link.emit(ctx, after, 100); err != nil {
		t.Fatal(err)
	}
	time.Sleep(time.Second)
	cancel()
	r := <-res
	t.Logf("%+v\n%s", r.rep, r.stderr)
	want := uint64(len(before) + len(after))
	if r.code != 0 || r.rep.LinesRead != want || r.rep.SamplesAcked != want {
		t.Fatalf("exit %d, read %d, acknowledged %d, want %d; stderr:\n%s", r.code, r.rep.LinesRead, r.rep.SamplesAcked, want, r.stderr)
	}
	if !strings.Contains(r.stderr, "lost") || !strings.Contains(r.stderr, "open again") {
		t.Errorf("the relay did not say it lost and reopened the port; stderr:\n%s", r.stderr)
	}
	if r.rep.Gaps < 1 {
		t.Errorf("gaps %d, want the pull counted as one", r.rep.Gaps)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	if l := ledgerOf(t, dir, "relay-replug"); l.Samples != want || !l.Distinct {
		t.Errorf("store ledger %+v, want %d samples once", l, want)
	}
}
