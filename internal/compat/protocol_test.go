package compat

import (
	"bytes"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"sync"
	"testing"
)

// Where things are, relative to this package's directory (the working
// directory of its tests).
const (
	protoDir    = "../../proto" // the buf module: buf.yaml, buf.gen.yaml, pulsefleet/v1
	generateGo  = "../../proto/pulsefleet/v1/generate.go"
	baselineDir = "testdata/v1baseline"              // the round-1 .proto files, verbatim
	frozenGoDir = "testdata/oldclient/pulsefleet/v1" // their generated code as released
)

// bufModule returns "github.com/bufbuild/buf/cmd/buf@vX.Y.Z" as pinned by
// the go:generate line, so the test and `go generate` can never use
// different versions.
func bufModule(t testing.TB) string {
	t.Helper()
	b, err := os.ReadFile(generateGo)
	if err != nil {
		t.Fatal(err)
	}
	m := regexp.MustCompile(`github\.com/bufbuild/buf/cmd/buf@v[0-9][0-9A-Za-z.+-]*`).Find(b)
	if m == nil {
		t.Fatalf("%s: no pinned github.com/bufbuild/buf/cmd/buf@vX.Y.Z in the go:generate line", generateGo)
	}
	return string(m)
}

var (
	bufOnce sync.Once
	bufPath string // the built buf, in a directory of this test process
	bufErr  error
)

// requireBuf builds the pinned buf once per test process from the Go module
// proxy (`go install module@version` into a private directory: the same
// module and version as `go run module@version` in go:generate, without
// relinking buf for every call). When that fails the test skips, or fails
// under PULSEFLEET_REQUIRE_TOOLS (CI).
func requireBuf(t testing.TB) {
	t.Helper()
	if testing.Short() {
		t.Skip("builds and runs buf; skipped with -short")
	}
	mod := bufModule(t)
	bufOnce.Do(func() {
		dir, err := os.MkdirTemp("", "pulsefleet-buf-")
		if err != nil {
			bufErr = err
			return
		}
		cleanups = append(cleanups, func() { os.RemoveAll(dir) })
		cmd := exec.Command("go", "install", mod)
		cmd.Env = append(os.Environ(), "GOBIN="+dir)
		if out, err := cmd.CombinedOutput(); err != nil {
			bufErr = fmt.Errorf("%v: %s", err, strings.TrimSpace(string(out)))
			return
		}
		bufPath = filepath.Join(dir, "buf")
	})
	if bufErr != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatalf("buf is required (PULSEFLEET_REQUIRE_TOOLS is set): go install %s: %v; run .ci/deps.d/buf.sh", mod, bufErr)
		}
		t.Skipf("buf unavailable (go install %s: %v)", mod, bufErr)
	}
}

// cleanups run after all tests of the package (TestMain).
var cleanups []func()

func TestMain(m *testing.M) {
	code := m.Run()
	for _, f := range cleanups {
		f()
	}
	os.Exit(code)
}

// buf runs the pinned buf in dir and returns its combined output.
func buf(t testing.TB, dir string, args ...string) (string, error) {
	t.Helper()
	cmd := exec.Command(bufPath, args...)
	cmd.Dir = dir
	out, err := cmd.CombinedOutput()
	return string(out), err
}

func TestProtoLintStandard(t *testing.T) {
	requireBuf(t)
	if out, err := buf(t, protoDir, "lint"); err != nil {
		t.Fatalf("buf lint (STANDARD, proto/buf.yaml) fails on proto/:\n%s", out)
	}
}

// TestProtoNotBreakingAgainstBaseline holds the current protocol to the v1
// promise: compared with the round-1 release, nothing a device or a script
// already relies on has changed (rules: proto/buf.yaml, breaking section).
func TestProtoNotBreakingAgainstBaseline(t *testing.T) {
	requireBuf(t)
	against, err := filepath.Abs(baselineDir)
	if err != nil {
		t.Fatal(err)
	}
	if out, err := buf(t, protoDir, "breaking", "--against", against); err != nil {
		t.Fatalf("the protocol in proto/ breaks the v1 promise against the round-1 baseline (%s); "+
			"see \"Compatibility promise\" in DEVELOPERS.md (a change of this kind needs pulsefleet.v2):\n%s", baselineDir, out)
	}
}

// TestGeneratedCodeIsFresh fails when the committed .pb.go files are not what
// `go generate ./proto/...` produces from the committed .proto files.
func TestGeneratedCodeIsFresh(t *testing.T) {
	requireBuf(t)
	out := t.TempDir()
	if msg, err := buf(t, protoDir, "generate", "-o", out); err != nil {
		t.Fatalf("buf generate (proto/buf.gen.yaml): %v\n%s", err, msg)
	}
	sameGoFiles(t, filepath.Join(out, "pulsefleet/v1"), filepath.Join(protoDir, "pulsefleet/v1"),
		"regenerate with `go generate ./proto/...` and commit the result")
}

// TestFrozenClientCodeIsTheBaselines checks that the frozen client's generated
// code is what the pinned generators make of the baseline .proto files, so
// nobody "updates" the old client by hand.
func TestFrozenClientCodeIsTheBaselines(t *testing.T) {
	requireBuf(t)
	out := t.TempDir()
	tmpl, err := filepath.Abs(filepath.Join(protoDir, "buf.gen.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if msg, err := buf(t, ".", "generate", baselineDir, "--template", tmpl, "-o", out); err != nil {
		t.Fatalf("buf generate %s: %v\n%s", baselineDir, err, msg)
	}
	sameGoFiles(t, filepath.Join(out, "pulsefleet/v1"), frozenGoDir,
		"the frozen client must keep the code generated from the round-1 baseline; never edit or regenerate it from proto/")
}

// sameGoFiles fails unless dir holds exactly the generated .pb.go files of
// want, byte for byte.
func sameGoFiles(t *testing.T, want, dir, fix string) {
	t.Helper()
	list := func(d string) []string {
		m, err := filepath.Glob(filepath.Join(d, "*.pb.go"))
		if err != nil {
			t.Fatal(err)
		}
		for i := range m {
			m[i] = filepath.Base(m[i])
		}
		slices.Sort(m)
		return m
	}
	w, g := list(want), list(dir)
	if len(w) == 0 {
		t.Fatalf("buf generate produced no .pb.go files in %s", want)
	}
	if !slices.Equal(w, g) {
		t.Errorf("%s holds %v, buf generate produces %v: %s", dir, g, w, fix)
	}
	for _, name := range w {
		a, err := os.ReadFile(filepath.Join(want, name))
		if err != nil {
			t.Fatal(err)
		}
		b, err := os.ReadFile(filepath.Join(dir, name))
		if err != nil {
			continue // reported above
		}
		if !bytes.Equal(a, b) {
			t.Errorf("%s differs from what buf generate produces from the .proto files (first difference at line %d): %s",
				filepath.Join(dir, name), firstDiffLine(a, b), fix)
		}
	}
}

func firstDiffLine(a, b []byte) int {
	la, lb := bytes.Split(a, []byte("\n")), bytes.Split(b, []byte("\n"))
	for i := 0; i < min(len(la), len(lb)); i++ {
		if !bytes.Equal(la[i], lb[i]) {
			return i + 1
		}
	}
	return min(len(la), len(lb)) + 1
}

// edit is one change to a copy of the baseline .proto files.
type edit struct {
	file     string // under pulsefleet/v1/
	old, new string // old must occur exactly once
}

// TestBreakingRulesCatchWhatV1Forbids applies single edits to a copy of the
// round-1 baseline and runs buf breaking with the project's rules
// (proto/buf.yaml) against the unchanged baseline: every edit that would
// break a device in the field or a script must be refused (with the named
// rule), and every edit the v1 promise allows must pass. The baseline is
// frozen, so these edits keep applying however proto/ evolves.
func TestBreakingRulesCatchWhatV1Forbids(t *testing.T) {
	requireBuf(t)
	cases := []struct {
		name  string
		edits []edit
		rule  string // "" = must pass; else the buf rule that must refuse it
	}{
		{"renumber a field", []edit{{"ingest.proto", "double sample_rate_hz = 3;", "double sample_rate_hz = 9;"}},
			"FIELD_NO_DELETE_UNLESS_NUMBER_RESERVED"},
		{"change a field's type", []edit{{"ingest.proto", "double sample_rate_hz = 3;", "float sample_rate_hz = 3;"}},
			"FIELD_WIRE_JSON_COMPATIBLE_TYPE"},
		{"change a field's type to one with the same wire type", []edit{{"ingest.proto", "uint32 adc_bits = 6;", "int32 adc_bits = 6;"}},
			"FIELD_SAME_TYPE"},
		{"rename a field in place (its JSON name changes)", []edit{{"fleet.proto", "double deficit_pct_s = 10;", "double area_below_limit_pct_s = 10;"}},
			"FIELD_SAME_JSON_NAME"},
		{"delete a field", []edit{{"ingest.proto", "  string notice = 5;\n", ""}},
			"FIELD_NO_DELETE_UNLESS_NUMBER_RESERVED"},
		{"retire a field reserving only its number", []edit{{"fleet.proto", "double deficit_pct_s = 10;", "reserved 10;\n  double area_below_limit_pct_s = 15;"}},
			"FIELD_NO_DELETE_UNLESS_NAME_RESERVED"},
		{"drop the presence of a field (absent would read as 0 %)", []edit{{"ingest.proto", "optional double spo2_pct = 3;", "double spo2_pct = 3;"}},
			"FIELD_SAME_CARDINALITY"},
		{"remove an enum value", []edit{{"ingest.proto", "  REJECT_REASON_WRONG_MODE = 6;\n", ""}},
			"ENUM_VALUE_NO_DELETE_UNLESS_NUMBER_RESERVED"},
		{"renumber an enum value", []edit{{"ingest.proto", "MODE_SUMMARY = 2;", "MODE_SUMMARY = 3;"}},
			"ENUM_VALUE_NO_DELETE_UNLESS_NUMBER_RESERVED"},
		{"move a field into a oneof", []edit{{"ingest.proto", "  string firmware = 3;\n", "  oneof build {\n    string firmware = 3;\n  }\n"}},
			"FIELD_SAME_ONEOF"},
		{"remove an RPC", []edit{{"fleet.proto", "  rpc ListEpisodes(ListEpisodesRequest) returns (ListEpisodesResponse);\n", ""}},
			"RPC_NO_DELETE"},
		{"make the device stream unary on the device side", []edit{{"ingest.proto", "rpc Connect(stream ConnectRequest)", "rpc Connect(ConnectRequest)"}},
			"RPC_SAME_CLIENT_STREAMING"},
		{"change an RPC's request type", []edit{{"fleet.proto", "rpc GetDevice(GetDeviceRequest)", "rpc GetDevice(ListDevicesRequest)"}},
			"RPC_SAME_REQUEST_TYPE"},
		{"rename the package (every method path changes)", []edit{
			{"ingest.proto", "package pulsefleet.v1;", "package pulsefleet.v2;"},
			{"fleet.proto", "package pulsefleet.v1;", "package pulsefleet.v2;"},
			{"admin.proto", "package pulsefleet.v1;", "package pulsefleet.v2;"}},
			"FILE_SAME_PACKAGE"},

		{"allowed: add fields, an RPC, an enum value and a message", []edit{
			{"ingest.proto", "  map<string, string> labels = 9;\n", "  map<string, string> labels = 9;\n  repeated string capabilities = 10;\n  string relay = 11;\n"},
			{"ingest.proto", "  string notice = 5;\n", "  string notice = 5;\n  repeated string capabilities = 6;\n"},
			{"ingest.proto", "  REJECT_REASON_WRONG_MODE = 6;\n", "  REJECT_REASON_WRONG_MODE = 6;\n  REJECT_REASON_CLOCK_FAULT = 7;\n"},
			{"fleet.proto", "  rpc ListDeviceQuality(ListDeviceQualityRequest) returns (ListDeviceQualityResponse);\n",
				"  rpc ListDeviceQuality(ListDeviceQualityRequest) returns (ListDeviceQualityResponse);\n  rpc ReviewEpisode(ReviewEpisodeRequest) returns (ReviewEpisodeResponse);\n"},
			{"fleet.proto", "message ListDeviceQualityRequest {}", "message ListDeviceQualityRequest {}\nmessage ReviewEpisodeRequest { uint64 episode_id = 1; }\nmessage ReviewEpisodeResponse {}"}},
			""},
		{"allowed: retire a field with its number and name reserved (issue 15's rename)", []edit{
			{"fleet.proto", "double deficit_pct_s = 10;", "reserved 10;\n  reserved \"deficit_pct_s\";\n  double area_below_limit_pct_s = 15;"}},
			""},
		{"allowed: deprecate a field", []edit{{"fleet.proto", "double deficit_pct_s = 10;", "double deficit_pct_s = 10 [deprecated = true];"}},
			""},
		{"allowed: change comments", []edit{{"ingest.proto", "// Raw samples (mode RAW).", "// Raw samples (mode RAW), see the device protocol guide."}},
			""},
	}
	cfg, err := os.ReadFile(filepath.Join(protoDir, "buf.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	against, err := filepath.Abs(baselineDir)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			if err := os.WriteFile(filepath.Join(dir, "buf.yaml"), cfg, 0o644); err != nil {
				t.Fatal(err)
			}
			if err := os.MkdirAll(filepath.Join(dir, "pulsefleet/v1"), 0o755); err != nil {
				t.Fatal(err)
			}
			files, err := filepath.Glob(filepath.Join(baselineDir, "pulsefleet/v1/*.proto"))
			if err != nil || len(files) == 0 {
				t.Fatalf("no baseline .proto files in %s (%v)", baselineDir, err)
			}
			src := map[string]string{}
			for _, f := range files {
				b, err := os.ReadFile(f)
				if err != nil {
					t.Fatal(err)
				}
				src[filepath.Base(f)] = string(b)
			}
			for _, e := range c.edits {
				if n := strings.Count(src[e.file], e.old); n != 1 {
					t.Fatalf("%s: %q occurs %d times in the baseline, want once", e.file, e.old, n)
				}
				src[e.file] = strings.Replace(src[e.file], e.old, e.new, 1)
			}
			for name, s := range src {
				if err := os.WriteFile(filepath.Join(dir, "pulsefleet/v1", name), []byte(s), 0o644); err != nil {
					t.Fatal(err)
				}
			}
			out, err := buf(t, dir, "breaking", "--against", against, "--error-format", "json")
			switch {
			case c.rule == "" && err != nil:
				t.Errorf("the v1 promise allows this edit, but buf breaking refuses it:\n%s", out)
			case c.rule != "" && err == nil:
				t.Errorf("buf breaking lets this edit through; want it refused by %s", c.rule)
			case c.rule != "" && !strings.Contains(out, `"type":"`+c.rule+`"`):
				t.Errorf("buf breaking refuses this edit, but not by %s:\n%s", c.rule, out)
			}
		})
	}
}
