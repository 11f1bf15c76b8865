package main

import (
	"bufio"
	"net"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/etcdtest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// etcdFleet is n `pulsefleet serve` processes joined through one real etcd,
// each on a fixed loopback gRPC address (its --advertise) with its own store.
type etcdFleet struct {
	t     testing.TB
	etcd  *etcdtest.Server
	addrs []string
	dirs  []string
	kids  []*child
	extra []string // more serve flags for every gateway
}

func newEtcdFleet(t testing.TB, n int, extra ...string) *etcdFleet {
	f := &etcdFleet{t: t, etcd: etcdtest.Start(t), extra: extra}
	for i := 0; i < n; i++ {
		l, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		f.addrs = append(f.addrs, l.Addr().String())
		l.Close()
		f.dirs = append(f.dirs, t.TempDir())
		f.kids = append(f.kids, nil)
	}
	for i := range f.addrs {
		f.start(t, i)
	}
	f.waitMembers(n, 30*time.Second)
	return f
}

// start runs gateway i (again, on the same address and store).
func (f *etcdFleet) start(t testing.TB, i int) {
	t.Helper()
	f.kids[i] = startServe(t, f.dirs[i], append([]string{"--grpc-listen", f.addrs[i], "--advertise", f.addrs[i], "--etcd", f.etcd.Endpoint(), "--log-level", "warn"}, f.extra...)...)
}

// kill ends gateway i with SIGKILL and waits for it.
func (f *etcdFleet) kill(i int) {
	f.t.Helper()
	if err := f.kids[i].cmd.Process.Signal(syscall.SIGKILL); err != nil {
		f.t.Fatal(err)
	}
	<-f.kids[i].exited
}

// stopAll ends every running gateway with SIGTERM (they flush and leave).
func (f *etcdFleet) stopAll() {
	f.t.Helper()
	for _, k := range f.kids {
		if k == nil || k.cmd.ProcessState != nil {
			continue
		}
		_ = k.cmd.Process.Signal(syscall.SIGTERM)
		select {
		case <-k.exited:
		case <-time.After(30 * time.Second):
			f.t.Errorf("a gateway did not stop within 30 s of SIGTERM; stderr:\n%s", k.stderr)
			k.cmd.Process.Kill()
			<-k.exited
		}
	}
}

var (
	connectedRe = regexp.MustCompile(`^pulsefleet_device_connected\{device="([^"]+)"\} 1$`)
	membersRe   = regexp.MustCompile(`^pulsefleet_cluster_members (\d+)$`)
)

// connected returns the devices gateway i has an open stream of (nil when
// it does not answer).
func (f *etcdFleet) connected(i int) map[string]bool {
	m := scrapeMetrics(f.kids[i].httpAddr)
	if m == "" {
		return nil
	}
	out := map[string]bool{}
	sc := bufio.NewScanner(strings.NewReader(m))
	for sc.Scan() {
		if g := connectedRe.FindStringSubmatch(sc.Text()); g != nil {
			out[g[1]] = true
		}
	}
	return out
}

func (f *etcdFleet) waitMembers(n int, within time.Duration) {
	f.t.Helper()
	deadline := time.Now().Add(within)
	for {
		ok := true
		for _, k := range f.kids {
			g := membersRe.FindStringSubmatch(findLine(scrapeMetrics(k.httpAddr), "pulsefleet_cluster_members "))
			ok = ok && g != nil && g[1] == strconv.Itoa(n)
		}
		if ok {
			return
		}
		if time.Now().After(deadline) {
			f.t.Fatalf("the gateways do not all see %d members within %v", n, within)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

func findLine(text, prefix string) string {
	for _, l := range strings.Split(text, "\n") {
		if strings.HasPrefix(l, prefix) {
			return l
		}
	}
	return ""
}

// openStores opens every gateway's store (all stopped) for the checks.
func (f *etcdFleet) openStores() []*store.DB {
	f.t.Helper()
	var dbs []*store.DB
	for _, d := range f.dirs {
		db, err := store.Open(d, store.Options{})
		if err != nil {
			f.t.Fatal(err)
		}
		f.t.Cleanup(func() { db.Close() })
		dbs = append(dbs, db)
	}
	return dbs
}
