// Package notifytest runs a real Prometheus Alertmanager for tests, with a
// webhook receiver run by the test that records what Alertmanager delivers.
// A test that needs Alertmanager fails without it when
// PULSEFLEET_REQUIRE_TOOLS is set (CI) and is skipped otherwise;
// .ci/deps.d/alertmanager.sh installs it (Debian's prometheus-alertmanager).
package notifytest

import (
	"encoding/json"
	"fmt"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"sync"
	"testing"
	"time"
)

// Binary returns the Alertmanager binary's path.
func Binary(t testing.TB) string {
	t.Helper()
	for _, name := range []string{"prometheus-alertmanager", "alertmanager"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
		t.Fatal("Alertmanager is required (PULSEFLEET_REQUIRE_TOOLS is set) but neither prometheus-alertmanager nor alertmanager is on PATH; .ci/deps.d/alertmanager.sh installs it")
	}
	t.Skip("Alertmanager not installed (.ci/deps.d/alertmanager.sh installs it)")
	return ""
}

// Delivered is one alert as a webhook notification carried it.
type Delivered struct {
	Receiver    string            // path of the webhook URL: which Alertmanager sent it
	Status      string            `json:"status"` // firing or resolved
	Labels      map[string]string `json:"labels"`
	Annotations map[string]string `json:"annotations"`
	StartsAt    time.Time         `json:"startsAt"`
	EndsAt      time.Time         `json:"endsAt"`
}

// Receiver is a webhook receiver: Alertmanager posts its notifications here.
type Receiver struct {
	srv *httptest.Server
	mu  sync.Mutex
	got []Delivered
}

// NewReceiver starts a receiver on loopback; it stops when the test ends.
func NewReceiver(t testing.TB) *Receiver {
	r := &Receiver{}
	r.srv = httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, req *http.Request) {
		var msg struct {
			Alerts []Delivered `json:"alerts"`
		}
		if err := json.NewDecoder(req.Body).Decode(&msg); err != nil {
			http.Error(w, err.Error(), http.StatusBadRequest)
			return
		}
		r.mu.Lock()
		for _, a := range msg.Alerts {
			a.Receiver = req.URL.Path
			r.got = append(r.got, a)
		}
		r.mu.Unlock()
	}))
	t.Cleanup(r.srv.Close)
	return r
}

// URL is the webhook URL for path (e.g. "/am-a").
func (r *Receiver) URL(path string) string { return r.srv.URL + path }

// All returns every alert received so far.
func (r *Receiver) All() []Delivered {
	r.mu.Lock()
	defer r.mu.Unlock()
	return append([]Delivered(nil), r.got...)
}

// Wait polls until ok holds for the alerts received or timeout passes; it
// returns the alerts and whether ok held.
func (r *Receiver) Wait(timeout time.Duration, ok func([]Delivered) bool) ([]Delivered, bool) {
	deadline := time.Now().Add(timeout)
	for {
		all := r.All()
		if ok(all) {
			return all, true
		}
		if time.Now().After(deadline) {
			return all, false
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// Alertmanager is a running (or stopped) Alertmanager process.
type Alertmanager struct {
	URL  string // http://127.0.0.1:PORT
	t    testing.TB
	bin  string
	args []string
	cmd  *exec.Cmd
	done chan struct{}
	log  *os.File
}

// Config is an Alertmanager configuration sending every alert, in its own
// group, to webhook at once (group_wait and group_interval of 1 s keep the
// tests short), resolved ones included.
func Config(webhook string) string {
	return fmt.Sprintf(`route:
  receiver: hook
  group_by: ['...']
  group_wait: 1s
  group_interval: 1s
  repeat_interval: 1h
receivers:
  - name: hook
    webhook_configs:
      - url: %q
        send_resolved: true
`, webhook)
}

// Start runs Alertmanager on a free loopback port with the given
// configuration, without clustering, and waits until it is ready. It is
// killed when the test ends.
func Start(t testing.TB, config string) *Alertmanager {
	t.Helper()
	bin := Binary(t)
	dir := t.TempDir()
	cfg := filepath.Join(dir, "alertmanager.yml")
	if err := os.WriteFile(cfg, []byte(config), 0o600); err != nil {
		t.Fatal(err)
	}
	port := FreePort(t)
	am := &Alertmanager{URL: "http://127.0.0.1:" + strconv.Itoa(port), t: t, bin: bin,
		args: []string{"--config.file=" + cfg, "--storage.path=" + filepath.Join(dir, "data"),
			"--web.listen-address=127.0.0.1:" + strconv.Itoa(port), "--cluster.listen-address=", "--log.level=warn"}}
	log, err := os.Create(filepath.Join(dir, "alertmanager.log"))
	if err != nil {
		t.Fatal(err)
	}
	am.log = log
	t.Cleanup(func() {
		am.Stop()
		log.Close()
	})
	am.Restart()
	return am
}

// Restart starts the stopped Alertmanager again on the same port.
func (am *Alertmanager) Restart() {
	am.t.Helper()
	if am.cmd != nil {
		am.t.Fatal("notifytest: Alertmanager is running")
	}
	cmd := exec.Command(am.bin, am.args...)
	cmd.Stdout, cmd.Stderr = am.log, am.log
	if err := cmd.Start(); err != nil {
		am.t.Fatal(err)
	}
	am.cmd, am.done = cmd, make(chan struct{})
	go func() { cmd.Wait(); close(am.done) }()
	deadline := time.Now().Add(20 * time.Second)
	for {
		resp, err := http.Get(am.URL + "/-/ready")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return
			}
		}
		select {
		case <-am.done:
			b, _ := os.ReadFile(am.log.Name())
			am.t.Fatalf("Alertmanager exited at start-up:\n%s", b)
		default:
		}
		if time.Now().After(deadline) {
			b, _ := os.ReadFile(am.log.Name())
			am.t.Fatalf("Alertmanager not ready at %s after 20 s:\n%s", am.URL, b)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// Stop kills the Alertmanager process (it keeps nothing of the alerts it
// held: they come back only when sent again).
func (am *Alertmanager) Stop() {
	if am.cmd == nil {
		return
	}
	am.cmd.Process.Kill()
	<-am.done
	am.cmd = nil
}

// FreePort returns a loopback TCP port that was free a moment ago.
func FreePort(t testing.TB) int {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port
}
