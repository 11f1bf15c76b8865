package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/profiles"
)

// profile list/get/set against a real gateway on loopback: a built-in set
// by name on one device is in force there and only there; a file works the
// same; bad calls exit 2 with one sentence.
func TestProfileCommand(t *testing.T) {
	addr := startQualityGateway(t, []string{"bed-1", "bed-2"}, 3, nil)
	code, out, stderr := runCmd("profile", "set", "--gateway", addr, "--device", "bed-1", "--builtin", "home-overnight", "--reason", "sent home")
	if code != 0 || !strings.Contains(out, "profile home-overnight in force for device bed-1") {
		t.Fatalf("set --builtin: exit %d, out %q, stderr %q", code, out, stderr)
	}
	code, out, stderr = runCmd("profile", "get", "--gateway", addr, "--device", "bed-1")
	if code != 0 || !strings.HasPrefix(out, "# profile home-overnight (device)") || !strings.Contains(out, "conditions:") {
		t.Errorf("get bed-1: exit %d, out %q, stderr %q", code, out, stderr)
	}
	code, out, _ = runCmd("profile", "list", "--gateway", addr)
	rows := map[string]string{}
	for _, l := range strings.Split(out, "\n") {
		if f := strings.Fields(l); len(f) == 4 && f[0] == addr {
			rows[f[1]] = f[2] + " " + f[3]
		}
	}
	if code != 0 || rows["bed-1"] != "home-overnight device" || rows["bed-2"] != "adult-ward-pilot default" || !strings.Contains(out, "spo2_low") {
		t.Errorf("list: exit %d, rows %v, out:\n%s", code, rows, out)
	}
	for _, n := range profiles.Names() {
		if !strings.Contains(out, n) {
			t.Errorf("list: built-in %s missing", n)
		}
	}
	// A file: the gateway default.
	b, err := profiles.Bytes("adult-ward-pilot")
	if err != nil {
		t.Fatal(err)
	}
	f := filepath.Join(t.TempDir(), "p.yaml")
	if err := os.WriteFile(f, b, 0o644); err != nil {
		t.Fatal(err)
	}
	if code, out, stderr := runCmd("profile", "set", "--gateway", addr, "--file", f); code != 0 || !strings.Contains(out, "in force for the gateway default") {
		t.Errorf("set --file: exit %d, out %q, stderr %q", code, out, stderr)
	}
	for _, c := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"profile", "set", "--gateway", addr}, 2, "give one of --file F or --builtin NAME"},
		{[]string{"profile", "set", "--gateway", addr, "--builtin", "nosuch"}, 2, `no built-in profile "nosuch"`},
		{[]string{"profile", "get", "--gateway", addr, "--device", "nosuch"}, 1, "NotFound: device_id"},
		{[]string{"profile", "frob"}, 2, `unknown subcommand "frob"`},
		{[]string{"profile"}, 2, "want a subcommand"},
	} {
		code, _, stderr := runCmd(c.args...)
		if code != c.code || !strings.Contains(stderr, c.want) || strings.Contains(stderr, "rpc error") {
			t.Errorf("%v: exit %d, stderr %q; want %d and %q", c.args, code, stderr, c.code, c.want)
		}
	}
}

// demo --profile names the profile; an unknown one fails before any device
// runs.
func TestDemoUnknownProfileFails(t *testing.T) {
	code, _, stderr := runCmd("demo", "--profile", "nosuch-profile")
	if code == 0 || !strings.Contains(stderr, "nosuch-profile") {
		t.Errorf("exit %d, stderr %q; want a failure naming the profile", code, stderr)
	}
}
