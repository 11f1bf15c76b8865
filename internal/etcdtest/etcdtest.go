// Package etcdtest runs a real etcd server (the etcd binary of Debian's
// etcd-server package, installed by .ci/deps.d/etcd.sh) for tests: one
// member on two free loopback ports, its data in a test temp directory,
// stopped when the test ends. Tests that need etcd call Start; when the
// binary is missing the test is skipped, or fails when
// PULSEFLEET_REQUIRE_TOOLS is set (CI).
//
// Why the external binary and not go.etcd.io/etcd/server/v3/embed: the
// server module would pull the whole etcd server (raft, its own grpc-gateway,
// otel, zap configuration...) into the product's go.mod, pinning versions the
// gateway does not need, only so tests can run it; and an external process
// is what production runs, can be stopped and restarted for the
// "etcd unreachable" tests exactly as an operator's etcd would be, and never
// shares the test's address space. The product's go.mod carries only the
// client (go.etcd.io/etcd/client/v3).
package etcdtest

import (
	"bytes"
	"context"
	"fmt"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"sync"
	"syscall"
	"testing"
	"time"

	clientv3 "go.etcd.io/etcd/client/v3"
	"go.uber.org/zap"
)

// Server is one etcd member run for a test.
type Server struct {
	t         testing.TB
	bin       string
	dir       string
	clientURL string
	peerURL   string
	mu        sync.Mutex
	cmd       *exec.Cmd
	out       *bytes.Buffer
	exited    chan struct{}
}

// Binary returns the etcd binary's path, skipping the test when it is
// missing (failing it with PULSEFLEET_REQUIRE_TOOLS set).
func Binary(t testing.TB) string {
	t.Helper()
	p, err := exec.LookPath("etcd")
	if err != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatalf("etcd is required (PULSEFLEET_REQUIRE_TOOLS is set): %v; .ci/deps.d/etcd.sh installs it", err)
		}
		t.Skipf("etcd not installed (%v); .ci/deps.d/etcd.sh installs it", err)
	}
	return p
}

// Start runs a fresh single-member etcd and waits until it answers.
func Start(t testing.TB) *Server {
	t.Helper()
	s := &Server{t: t, bin: Binary(t), dir: t.TempDir()}
	s.clientURL = "http://" + freeAddr(t)
	s.peerURL = "http://" + freeAddr(t)
	s.Start()
	t.Cleanup(s.Stop)
	return s
}

// Endpoint is the client URL (http://127.0.0.1:PORT).
func (s *Server) Endpoint() string { return s.clientURL }

// Start starts the server again after Stop, on the same ports and data.
func (s *Server) Start() {
	s.t.Helper()
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.cmd != nil {
		return
	}
	s.out = &bytes.Buffer{}
	cmd := exec.Command(s.bin,
		"--name", "test",
		"--data-dir", filepath.Join(s.dir, "data"),
		"--listen-client-urls", s.clientURL, "--advertise-client-urls", s.clientURL,
		"--listen-peer-urls", s.peerURL, "--initial-advertise-peer-urls", s.peerURL,
		"--initial-cluster", "test="+s.peerURL,
		"--logger", "zap", "--log-level", "warn")
	cmd.Stdout, cmd.Stderr = s.out, s.out
	cmd.SysProcAttr = &syscall.SysProcAttr{Pdeathsig: syscall.SIGKILL}
	if err := cmd.Start(); err != nil {
		s.t.Fatalf("etcd: %v", err)
	}
	s.cmd, s.exited = cmd, make(chan struct{})
	go func(c *exec.Cmd, done chan struct{}) { _ = c.Wait(); close(done) }(cmd, s.exited)
	if err := s.waitReady(20 * time.Second); err != nil {
		s.t.Fatalf("etcd did not come up: %v\n%s", err, s.out.String())
	}
}

func (s *Server) waitReady(within time.Duration) error {
	c, err := clientv3.New(clientv3.Config{Endpoints: []string{s.clientURL}, DialTimeout: time.Second, Logger: zap.NewNop()})
	if err != nil {
		return err
	}
	defer c.Close()
	deadline := time.Now().Add(within)
	for {
		ctx, cancel := context.WithTimeout(context.Background(), time.Second)
		_, err := c.Get(ctx, "health-probe")
		cancel()
		if err == nil {
			return nil
		}
		select {
		case <-s.exited:
			return fmt.Errorf("etcd exited: %w", err)
		default:
		}
		if time.Now().After(deadline) {
			return err
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// Stop ends the server (SIGTERM, then SIGKILL after 5 s); Start brings it
// back. Safe to call twice.
func (s *Server) Stop() {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.cmd == nil {
		return
	}
	_ = s.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-s.exited:
	case <-time.After(5 * time.Second):
		_ = s.cmd.Process.Kill()
		<-s.exited
	}
	s.cmd = nil
}

// Client returns a client of the server, closed when the test ends.
func (s *Server) Client(t testing.TB) *clientv3.Client {
	t.Helper()
	c, err := clientv3.New(clientv3.Config{Endpoints: []string{s.clientURL}, DialTimeout: 2 * time.Second, Logger: zap.NewNop()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { c.Close() })
	return c
}

func freeAddr(t testing.TB) string {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().String()
}
