package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/csv"
	"fmt"
	"io"
	"math"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

var (
	binOnce sync.Once
	binPath string
	binErr  error
)

// binary builds the pulsefleet binary once for the process tests.
func binary(t testing.TB) string {
	t.Helper()
	binOnce.Do(func() {
		dir, err := os.MkdirTemp("", "pulsefleet-bin")
		if err != nil {
			binErr = err
			return
		}
		binPath = filepath.Join(dir, "pulsefleet")
		out, err := exec.Command("go", "build", "-o", binPath, ".").CombinedOutput()
		if err != nil {
			binErr = fmt.Errorf("go build: %v\n%s", err, out)
		}
	})
	if binErr != nil {
		t.Fatal(binErr)
	}
	return binPath
}

// child is a `pulsefleet serve` process.
type child struct {
	cmd      *exec.Cmd
	grpcAddr string
	httpAddr string
	stderr   *bytes.Buffer
	exited   chan error
}

func startServe(t testing.TB, dataDir string, extra ...string) *child {
	t.Helper()
	args := append([]string{"serve", "--data", dataDir, "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0", "--batch-delay", "5ms"}, extra...)
	cmd := exec.Command(binary(t), args...)
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	c := &child{cmd: cmd, stderr: &bytes.Buffer{}, exited: make(chan error, 1)}
	cmd.Stderr = &lockedWriter{w: c.stderr}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	grpcRe := regexp.MustCompile(`gRPC:\s+(\S+)`)
	webRe := regexp.MustCompile(`web:\s+http://([^/]+)/`)
	sc := bufio.NewScanner(stdout)
	for sc.Scan() {
		if m := grpcRe.FindStringSubmatch(sc.Text()); m != nil {
			c.grpcAddr = m[1]
		}
		if m := webRe.FindStringSubmatch(sc.Text()); m != nil {
			c.httpAddr = m[1]
		}
		if c.grpcAddr != "" && c.httpAddr != "" {
			break
		}
	}
	go func() { io.Copy(io.Discard, stdout); c.exited <- cmd.Wait() }()
	if c.grpcAddr == "" {
		cmd.Process.Kill()
		<-c.exited
		t.Fatalf("serve did not print its addresses; stderr:\n%s", c.stderr)
	}
	t.Cleanup(func() {
		if cmd.ProcessState == nil {
			cmd.Process.Kill()
			<-c.exited
		}
	})
	return c
}

// kill -9 of the gateway in the middle of streaming loses nothing that was
// acknowledged: the store, reopened, holds every acknowledged message of
// every device, raw and summary.
func TestKill9LosesNothingAcknowledged(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	data := t.TempDir()
	c := startServe(t, data)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var wg sync.WaitGroup
	reports := make([]*sim.Report, 2)
	for i, mode := range []sim.Mode{sim.ModeSummary, sim.ModeRaw} {
		wg.Add(1)
		go func(i int, mode sim.Mode) {
			defer wg.Done()
			r, err := sim.Run(ctx, sim.Options{Gateway: c.grpcAddr, Devices: 10, IDPrefix: "k9-" + string(mode), Mode: mode,
				RateHz: 100, Speed: 20, Seed: uint64(i + 1), Drain: -1})
			if err != nil {
				t.Errorf("sim %s: %v", mode, err)
			}
			reports[i] = r
		}(i, mode)
	}
	// Let acknowledgements flow, then kill the gateway without warning.
	deadline := time.Now().Add(30 * time.Second)
	for time.Now().Before(deadline) && !strings.Contains(scrapeMetrics(c.httpAddr), `pulsefleet_messages_received_total{mode="raw"}`) {
		time.Sleep(100 * time.Millisecond)
	}
	time.Sleep(2 * time.Second)
	if err := c.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	<-c.exited
	time.Sleep(300 * time.Millisecond)
	cancel()
	wg.Wait()

	db, err := store.Open(data, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if err := db.Check(); err != nil {
		t.Fatalf("store integrity after kill -9: %v", err)
	}
	tot, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	acked := 0
	for _, r := range reports {
		if r == nil {
			t.Fatal("a simulator run did not report")
		}
		for id, dr := range r.PerDevice {
			lt := tot[id]
			acked += int(dr.FramesAcked)
			// Sequence numbers start at 1 on a fresh store and the simulator sends no gaps.
			if lt.MaxSeq < dr.AckedThrough || lt.Chunks < dr.AckedThrough || !lt.Distinct {
				t.Errorf("%s: acknowledged through %d, store ledger %+v", id, dr.AckedThrough, lt)
			}
			if dr.Mode == sim.ModeRaw && lt.Samples < dr.SamplesAcked {
				t.Errorf("%s: %d samples acknowledged, %d in the store", id, dr.SamplesAcked, lt.Samples)
			}
			if dr.Mode == sim.ModeSummary {
				n := 0
				db.Trend(id, 0, math.MaxInt64, func(store.Point) bool { n++; return true })
				if uint64(n) < dr.AckedThrough {
					t.Errorf("%s: %d summaries acknowledged, %d trend points stored", id, dr.AckedThrough, n)
				}
			}
		}
	}
	if acked == 0 {
		t.Fatal("nothing was acknowledged before the kill: the test proved nothing")
	}
	t.Logf("%d messages acknowledged before kill -9; all in the reopened store", acked)
}

func scrapeMetrics(addr string) string {
	resp, err := http.Get("http://" + addr + "/metrics")
	if err != nil {
		return ""
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return string(b)
}

// 50 devices stream summaries; /metrics counts them; after SIGTERM and a
// restart every acknowledged point is returned by the trend query and by
// export.
func TestSigtermRestartTrendAndExport(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	data := t.TempDir()
	c := startServe(t, data)
	start := time.Now().Add(-time.Hour).Truncate(time.Second)
	rep, err := sim.Run(context.Background(), sim.Options{Gateway: c.grpcAddr, Devices: 50, IDPrefix: "pilot", Mode: sim.ModeSummary,
		Speed: 10, Duration: 3 * time.Second, Seed: 3, Start: start})
	if err != nil {
		t.Fatal(err)
	}
	if rep.FramesAcked == 0 || rep.UnackedAtEnd != 0 {
		t.Fatalf("simulator: %+v", rep)
	}
	m := scrapeMetrics(c.httpAddr)
	if want := fmt.Sprintf(`pulsefleet_messages_received_total{mode="summary"} %d`, rep.FramesAcked); !strings.Contains(m, want) {
		t.Errorf("/metrics lacks %q", want)
	}
	// Streams end asynchronously after the simulator closes them.
	for i := 0; i < 100 && !strings.Contains(m, "pulsefleet_devices_connected 0"); i++ {
		time.Sleep(50 * time.Millisecond)
		m = scrapeMetrics(c.httpAddr)
	}
	if !strings.Contains(m, "pulsefleet_devices_connected 0") {
		t.Errorf("/metrics: devices still connected after the run")
	}
	if err := c.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	if err := <-c.exited; err != nil {
		t.Fatalf("serve after SIGTERM: %v\n%s", err, c.stderr)
	}

	c2 := startServe(t, data)
	conn, err := grpc.NewClient(c2.grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	fleet := pb.NewFleetServiceClient(conn)
	devs, err := fleet.ListDevices(context.Background(), &pb.ListDevicesRequest{})
	if err != nil {
		t.Fatal(err)
	}
	if len(devs.Devices) != 50 {
		t.Errorf("%d devices after restart, want 50", len(devs.Devices))
	}
	for id, dr := range rep.PerDevice {
		resp, err := fleet.QueryTrend(context.Background(), &pb.QueryTrendRequest{DeviceId: id, FromUnixMs: 1, ToUnixMs: math.MaxInt64})
		if err != nil {
			t.Fatal(err)
		}
		if uint64(len(resp.Points)) != dr.FramesAcked {
			t.Errorf("%s: %d points after restart, %d acknowledged", id, len(resp.Points), dr.FramesAcked)
		}
	}
	c2.cmd.Process.Signal(syscall.SIGTERM)
	if err := <-c2.exited; err != nil {
		t.Fatalf("second serve: %v", err)
	}

	out, err := exec.Command(binary(t), "export", "--data", data, "--format", "csv").Output()
	if err != nil {
		t.Fatalf("export: %v", err)
	}
	cr := csv.NewReader(bytes.NewReader([]byte(afterCaution(t, "export CSV", string(out)))))
	rows, err := cr.ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	perDev := map[string]uint64{}
	for _, r := range rows[1:] {
		perDev[r[1]]++
	}
	for id, dr := range rep.PerDevice {
		if perDev[id] != dr.FramesAcked {
			t.Errorf("export %s: %d rows, %d acknowledged", id, perDev[id], dr.FramesAcked)
		}
	}
}
