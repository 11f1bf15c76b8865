package deploy

import (
	"bufio"
	"bytes"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
)

// needTool returns the path of an external tool, skipping the test when it is
// missing unless PULSEFLEET_REQUIRE_TOOLS is set (CI), where it fails.
func needTool(t *testing.T, name, install string) string {
	t.Helper()
	p, err := exec.LookPath(name)
	if err != nil {
		msg := name + " not found (" + install + ")"
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatal(msg)
		}
		t.Skip(msg)
	}
	return p
}

// unitForAnalysis copies the unit into a temporary directory with ExecStart
// pointing at an existing executable (verify checks that it exists; the
// pulsefleet binary is not installed here).
func unitForAnalysis(t *testing.T) string {
	t.Helper()
	b, err := os.ReadFile(filepath.Join("systemd", "pulsefleet.service"))
	if err != nil {
		t.Fatal(err)
	}
	exe, err := os.Executable()
	if err != nil {
		t.Fatal(err)
	}
	u := strings.ReplaceAll(string(b), "ExecStart=/usr/local/bin/pulsefleet ", "ExecStart="+exe+" ")
	if u == string(b) {
		t.Fatal("unit has no ExecStart=/usr/local/bin/pulsefleet")
	}
	p := filepath.Join(t.TempDir(), "pulsefleet.service")
	if err := os.WriteFile(p, []byte(u), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

// systemd-analyze verify prints warnings (unknown keys, bad values) yet exits
// 0, so any output is a failure.
func TestSystemdUnitVerifies(t *testing.T) {
	sa := needTool(t, "systemd-analyze", ".ci/deps.d/systemd.sh installs it")
	unit := unitForAnalysis(t)
	out, err := exec.Command(sa, "verify", unit).CombinedOutput()
	if err != nil || len(bytes.TrimSpace(out)) > 0 {
		t.Fatalf("systemd-analyze verify: %v\n%s", err, out)
	}
	// The check can fail: a misspelt key is reported.
	bad := filepath.Join(filepath.Dir(unit), "bad.service")
	b, _ := os.ReadFile(unit)
	os.WriteFile(bad, bytes.Replace(b, []byte("NoNewPrivileges="), []byte("NoNewPrivilege="), 1), 0o644)
	if out, _ := exec.Command(sa, "verify", bad).CombinedOutput(); !bytes.Contains(out, []byte("NoNewPrivilege")) {
		t.Errorf("verify did not report a misspelt key: %s", out)
	}
}

// systemd's own exposure score: the unit stays at or below 2.0 on
// systemd-analyze's 0..10 scale (--threshold counts tenths); it is about 1.2.
func TestSystemdUnitExposure(t *testing.T) {
	sa := needTool(t, "systemd-analyze", ".ci/deps.d/systemd.sh installs it")
	out, err := exec.Command(sa, "security", "--offline=true", "--threshold=20", "--no-pager", unitForAnalysis(t)).CombinedOutput()
	m := regexp.MustCompile(`Overall exposure level for \S+: ([0-9.]+)`).FindSubmatch(out)
	if err != nil || m == nil {
		t.Fatalf("systemd-analyze security: %v (want exposure <= 2.0)\n%s", err, out)
	}
	t.Logf("exposure %s", m[1])
}

// The unit's ${VAR} and $VAR references are all set in the environment file,
// and the environment file sets nothing the unit or Go does not read.
func TestSystemdEnvironmentFile(t *testing.T) {
	unit, err := os.ReadFile(filepath.Join("systemd", "pulsefleet.service"))
	if err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(filepath.Join("systemd", "pulsefleet.env"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	set := map[string]bool{}
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		line := strings.TrimSpace(sc.Text())
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		k, _, ok := strings.Cut(line, "=")
		if !ok || !regexp.MustCompile(`^[A-Z_][A-Z0-9_]*$`).MatchString(k) {
			t.Errorf("environment file line %q is not NAME=value", line)
		}
		set[k] = true
	}
	used := map[string]bool{"GOMEMLIMIT": true} // read by the Go runtime
	for _, m := range regexp.MustCompile(`\$\{?([A-Z_][A-Z0-9_]*)\}?`).FindAllStringSubmatch(string(unit), -1) {
		used[m[1]] = true
		if !set[m[1]] {
			t.Errorf("unit uses $%s, not set in pulsefleet.env", m[1])
		}
	}
	for k := range set {
		if !used[k] {
			t.Errorf("pulsefleet.env sets %s, which nothing reads", k)
		}
	}
	if !bytes.Contains(unit, []byte("EnvironmentFile=/etc/pulsefleet/pulsefleet.env")) {
		t.Errorf("unit does not read /etc/pulsefleet/pulsefleet.env")
	}
}
