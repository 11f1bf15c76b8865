package main

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/caution"
)

// A config file's unknown key or bad value is an error that names it, and
// flags given on the command line override the file.
func TestServeConfigErrorsNameTheKey(t *testing.T) {
	dir := t.TempDir()
	write := func(body string) string {
		p := filepath.Join(dir, "c.yaml")
		if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
			t.Fatal(err)
		}
		return p
	}
	cases := []struct{ body, want string }{
		{"grpc_listne: 127.0.0.1:1\n", "grpc_listne"},
		{"trend_days: -3\n", "trend-days: -3"},
		{"grpc_listen: 10.1.2.3:7400\n", "not a loopback address"},
		{"batch_delay: 1h\n", "batch-delay: 1h0m0s, want 1ms..2s"},
		{"log_level: loud\n", `log-level: "loud"`},
	}
	// A config that wrongly validates must not leave a gateway running: the
	// context is already cancelled, so serve would start and stop at once.
	done, cancel := context.WithCancel(context.Background())
	cancel()
	for _, c := range cases {
		var out, errb bytes.Buffer
		code := run(done, []string{"serve", "--config", write(c.body), "--data", dir}, stdio{out: &out, err: &errb})
		if code == 0 || !strings.Contains(errb.String(), c.want) {
			t.Errorf("config %q: exit %d, stderr %q; want an error naming %q", c.body, code, errb.String(), c.want)
		}
	}
	// The file says a non-loopback address; the command line overrides it.
	c := defaultServeConfig()
	if err := loadServeConfig(write("grpc_listen: 10.1.2.3:7400\ntrend_days: 30\n"), &c); err != nil {
		t.Fatal(err)
	}
	if c.GRPCListen != "10.1.2.3:7400" || c.TrendDays != 30 {
		t.Errorf("config not applied: %+v", c)
	}
	var out, errb bytes.Buffer
	code := run(done, []string{"serve", "--config", write("grpc_listen: 10.1.2.3:7400\nlog_level: loud\n"), "--grpc-listen", "127.0.0.1:0", "--log-level", "info",
		"--data", dir, "--http-listen", "127.0.0.1:0", "--peers", "x:1"}, stdio{out: &out, err: &errb})
	// Every file value was overridden; what remains wrong is --peers without a matching --self.
	if code != 2 || !strings.Contains(errb.String(), "self:") {
		t.Errorf("override: exit %d, stderr %q", code, errb.String())
	}
}

// serve says it is not a certified medical alarm before anything else, in
// the project's one caution text (docs/contracts.md, "The caution on every
// output"). The context is already cancelled: the gateway starts and stops.
func TestServeStartsWithTheCaution(t *testing.T) {
	done, cancel := context.WithCancel(context.Background())
	cancel()
	var out, errb bytes.Buffer
	code := run(done, []string{"serve", "--data", t.TempDir(), "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0"},
		stdio{in: strings.NewReader(""), out: &out, err: &errb})
	if code != 0 {
		t.Fatalf("serve exit %d: %s", code, errb.String())
	}
	first, _, _ := strings.Cut(errb.String(), "\n")
	if first != caution.Line {
		t.Errorf("serve's first line of standard error is %q, want the caution %q", first, caution.Line)
	}
	if !strings.Contains(caution.Line, "NOT a certified medical alarm") {
		t.Errorf("caution.Line = %q", caution.Line)
	}
}
