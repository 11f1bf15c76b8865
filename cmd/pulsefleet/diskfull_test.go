package main

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"errors"
	"io"
	"math"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// mountTmpfs mounts a small tmpfs for a store that can really fill up. It
// needs root: without it the test is skipped (the in-process test
// TestIntermittentWriteFailuresLoseNothingAcknowledged in package gateway
// injects failures at the store boundary instead); as root with
// PULSEFLEET_REQUIRE_TOOLS set (CI), a failed mount fails the test.
func mountTmpfs(t *testing.T, size string) string {
	t.Helper()
	if os.Geteuid() != 0 {
		t.Skip("mounting a tmpfs needs root; the injected-failure test covers unprivileged runs")
	}
	dir := t.TempDir()
	if out, err := exec.Command("mount", "-t", "tmpfs", "-o", "size="+size, "tmpfs", dir).CombinedOutput(); err != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatalf("mount tmpfs: %v: %s", err, out)
		}
		t.Skipf("mount tmpfs: %v: %s", err, out)
	}
	t.Cleanup(func() {
		if out, err := exec.Command("umount", "-l", dir).CombinedOutput(); err != nil {
			t.Errorf("umount %s: %v: %s", dir, err, out)
		}
	})
	return dir
}

// edgeOfFull keeps the file system of dir full: it fills a ballast file
// until ENOSPC, then frees 256 KiB each second, which the store soon takes
// again (the recipe). stop removes the ballast and returns how many
// times the disk was found full.
func edgeOfFull(t *testing.T, dir string) (stop func() int) {
	t.Helper()
	path := filepath.Join(dir, "ballast")
	f, err := os.OpenFile(path, os.O_CREATE|os.O_RDWR, 0o600)
	if err != nil {
		t.Fatal(err)
	}
	done := make(chan struct{})
	var wg sync.WaitGroup
	var mu sync.Mutex
	fulls := 0
	block := make([]byte, 64<<10)
	wg.Add(1)
	go func() {
		defer wg.Done()
		for {
			// Fill what is free.
			for {
				if _, err := f.Write(block); err != nil {
					if errors.Is(err, syscall.ENOSPC) {
						mu.Lock()
						fulls++
						mu.Unlock()
					}
					break
				}
			}
			select {
			case <-done:
				return
			case <-time.After(time.Second):
			}
			if st, err := f.Stat(); err == nil && st.Size() > 256<<10 {
				_ = f.Truncate(st.Size() - 256<<10)
				_, _ = f.Seek(st.Size()-256<<10, io.SeekStart)
			}
		}
	}()
	return func() int {
		close(done)
		wg.Wait()
		f.Close()
		os.Remove(path)
		mu.Lock()
		defer mu.Unlock()
		return fulls
	}
}

// perDeviceAcked reads `pulsefleet sim --per-device-out`: device -> acked_through.
func perDeviceAcked(t *testing.T, path string) map[string]uint64 {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]uint64{}
	for _, r := range rows[1:] {
		n, err := strconv.ParseUint(r[4], 10, 64)
		if err != nil {
			t.Fatalf("per-device row %v: %v", r, err)
		}
		out[r[0]] = n
	}
	return out
}

// exportedPoints runs `pulsefleet export --format csv` on a stopped store
// and counts trend points per device.
func exportedPoints(t *testing.T, data string) map[string]uint64 {
	t.Helper()
	out, err := exec.Command(binary(t), "export", "--data", data, "--format", "csv").Output()
	if err != nil {
		t.Fatalf("export: %v", err)
	}
	counts := map[string]uint64{}
	sc := bufio.NewScanner(bytes.NewReader(out))
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	for sc.Scan() {
		f := strings.Split(sc.Text(), ",")
		if len(f) < 9 || f[0] == "t_s" {
			continue // the caution line, the header
		}
		counts[f[1]]++
	}
	return counts
}

// checkAllExported fails for every device whose acknowledged summaries are
// not all in the export (the simulator numbers 1, 2, ... one summary per
// device second, so acknowledged through n needs n points).
func checkAllExported(t *testing.T, acked, exported map[string]uint64) (total uint64) {
	t.Helper()
	bad := 0
	for id, n := range acked {
		total += n
		if exported[id] < n {
			if bad++; bad <= 5 {
				t.Errorf("%s: acknowledged through %d, %d points exported", id, n, exported[id])
			}
		}
	}
	if bad > 5 {
		t.Errorf("... %d devices in all miss acknowledged points", bad)
	}
	return total
}

func metricValue(text, name string) (float64, bool) {
	m := regexp.MustCompile(`(?m)^` + regexp.QuoteMeta(name) + ` (\S+)$`).FindStringSubmatch(text)
	if m == nil {
		return 0, false
	}
	v, err := strconv.ParseFloat(m[1], 64)
	return v, err == nil
}

func waitHTTP(t *testing.T, limit time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(limit)
	for !cond() {
		if time.Now().After(deadline) {
			t.Errorf("timed out waiting until %s", what)
			return
		}
		time.Sleep(200 * time.Millisecond)
	}
}

func readyzCode(addr string) int {
	resp, err := http.Get("http://" + addr + "/readyz")
	if err != nil {
		return 0
	}
	resp.Body.Close()
	return resp.StatusCode
}

// A data directory on a 40 MB tmpfs kept at the edge of full while 200
// summary devices send 20 summaries/s each: every message the simulator was
// acknowledged is in the exported history, /readyz recovers once there is
// room, and pulsefleet_devices_connected returns to the true count (0).
func TestDiskFullKeepsEverythingAcknowledged(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	dir := mountTmpfs(t, "40m")
	data := filepath.Join(dir, "data")
	c := startServe(t, data)
	per := filepath.Join(t.TempDir(), "per.csv")
	simCmd := exec.Command(binary(t), "sim", "--gateway", c.grpcAddr, "--mode", "summary", "--devices", "200",
		"--speed", "20", "--duration", "25s", "--drain", "20s", "--id-prefix", "full", "--progress-every", "1h",
		"--per-device-out", per)
	var simOut bytes.Buffer
	simCmd.Stdout, simCmd.Stderr = &simOut, &simOut
	if err := simCmd.Start(); err != nil {
		t.Fatal(err)
	}
	time.Sleep(3 * time.Second) // streaming, then the disk fills
	stop := edgeOfFull(t, dir)
	time.Sleep(20 * time.Second)
	metrics := scrapeMetrics(c.httpAddr)
	fulls := stop() // room again
	if err := simCmd.Wait(); err != nil {
		t.Logf("sim: %v", err)
	}
	t.Logf("sim: %s", lastLine(simOut.String()))
	failures, _ := metricValue(metrics, "pulsefleet_store_write_errors_total")
	if failures == 0 {
		t.Fatalf("no store write failed (disk found full %d times): the test proved nothing", fulls)
	}
	waitHTTP(t, 20*time.Second, "/readyz is 200 again", func() bool { return readyzCode(c.httpAddr) == http.StatusOK })
	waitHTTP(t, 20*time.Second, "pulsefleet_devices_connected is 0 with no stream open", func() bool {
		v, ok := metricValue(scrapeMetrics(c.httpAddr), "pulsefleet_devices_connected")
		return ok && v == 0
	})
	if err := c.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	<-c.exited
	total := checkAllExported(t, perDeviceAcked(t, per), exportedPoints(t, data))
	if total == 0 {
		t.Fatal("nothing acknowledged: the test proved nothing")
	}
	t.Logf("%d messages acknowledged, all exported; %v store writes failed; disk found full %d times", total, failures, fulls)
}

// freePort returns a loopback address free a moment ago (for a gateway
// that must come back on the same address after kill -9).
func freePort(t *testing.T) string {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().String()
}

// Soak: while 200 summary devices stream, the gateway is killed with
// SIGKILL and restarted, and its disk is kept at the edge of full, in
// alternating phases (about a minute in all). Nothing acknowledged is lost.
func TestSoakKill9AndDiskFull(t *testing.T) {
	if testing.Short() {
		t.Skip("soak")
	}
	dir := mountTmpfs(t, "40m")
	data := filepath.Join(dir, "data")
	addr := freePort(t)
	c := startServe(t, data, "--grpc-listen", addr)
	per := filepath.Join(t.TempDir(), "per.csv")
	simCmd := exec.Command(binary(t), "sim", "--gateway", addr, "--mode", "summary", "--devices", "200",
		"--speed", "20", "--duration", "50s", "--drain", "30s", "--id-prefix", "soak", "--progress-every", "1h",
		"--per-device-out", per)
	var simOut bytes.Buffer
	simCmd.Stdout, simCmd.Stderr = &simOut, &simOut
	if err := simCmd.Start(); err != nil {
		t.Fatal(err)
	}
	kills, fullPhases := 0, 0
	for phase := 0; phase < 6; phase++ {
		time.Sleep(3 * time.Second)
		if phase%2 == 0 {
			stop := edgeOfFull(t, dir)
			time.Sleep(5 * time.Second)
			if stop() > 0 {
				fullPhases++
			}
			continue
		}
		if err := c.cmd.Process.Signal(syscall.SIGKILL); err != nil {
			t.Fatal(err)
		}
		<-c.exited
		kills++
		time.Sleep(500 * time.Millisecond)
		c = startServe(t, data, "--grpc-listen", addr)
	}
	if err := simCmd.Wait(); err != nil {
		t.Logf("sim: %v", err)
	}
	t.Logf("sim: %s", lastLine(simOut.String()))
	if err := c.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	<-c.exited
	acked, exported := perDeviceAcked(t, per), exportedPoints(t, data)
	total := checkAllExported(t, acked, exported)
	if t.Failed() {
		t.Logf("sim: %s", simOut.String())
		explainMissing(t, data, acked, exported)
	}
	if total == 0 || kills == 0 || fullPhases == 0 {
		t.Fatalf("acknowledged %d, kills %d, disk-full phases %d: the soak proved nothing", total, kills, fullPhases)
	}
	t.Logf("%d kill -9, %d disk-full phases; %d messages acknowledged, all exported", kills, fullPhases, total)
}

// explainMissing logs, for each device whose export misses acknowledged
// points, what its store holds: the durable cursor (resume point, messages
// accepted and sequence numbers skipped as lost), the ledger and the trend
// points read directly. Lost above 0 means the gateway accepted a message
// across a gap, so its acknowledgement covered messages it never stored;
// trend points beyond the export's count mean the export missed stored ones.
func explainMissing(t *testing.T, data string, acked, exported map[string]uint64) {
	t.Helper()
	db, err := store.Open(data, store.Options{ReadOnly: true})
	if err != nil {
		t.Logf("open the store to explain: %v", err)
		return
	}
	defer db.Close()
	curs, err := db.Cursors()
	if err != nil {
		t.Logf("cursors: %v", err)
	}
	ledger, err := db.LedgerTotals()
	if err != nil {
		t.Logf("ledger: %v", err)
	}
	for id, n := range acked {
		if exported[id] >= n {
			continue
		}
		stored := 0
		if err := db.Trend(id, 0, math.MaxInt64, func(store.Point) bool { stored++; return true }); err != nil {
			t.Logf("%s: trend: %v", id, err)
		}
		c := curs[id]
		t.Logf("%s: acknowledged through %d, exported %d, trend points in the store %d; cursor: resume after %d, accepted %d, lost %d, duplicates %d, rejected %d; ledger %+v",
			id, n, exported[id], stored, c.LastSeq, c.Chunks, c.Lost, c.Duplicates, c.Rejected, ledger[id])
	}
}
