package main

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
)

// Failures fail loudly (issue 15, RULES "Failures fail loudly"): each case
// below is a command that could not do its job; it must exit non-zero with
// one sentence naming what and why.

// errorText drops grpc-go's transport prefix and a word repeated by two
// layers of wrapping; the gateway's own sentence stays whole.
func TestErrorTextDropsTransportPrefixAndRepeats(t *testing.T) {
	cases := []struct {
		err  error
		want string
	}{
		{fmt.Errorf("gateway 127.0.0.1:7400: %w", status.Error(codes.NotFound, `calibration: calibration "x" not found`)),
			`gateway 127.0.0.1:7400: NotFound: calibration "x" not found`},
		{status.Error(codes.InvalidArgument, `device_id: "" is empty`), `InvalidArgument: device_id: "" is empty`},
		{errors.New(`open stream: rpc error: code = Unavailable desc = connection error: desc = "transport: Error while dialing: dial tcp 127.0.0.1:1: connect: connection refused"`),
			`open stream: Unavailable: cannot connect: dial tcp 127.0.0.1:1: connect: connection refused`},
		{errors.New("config: line 2: x"), "config: line 2: x"},
	}
	for _, c := range cases {
		if got := errorText(c.err); got != c.want {
			t.Errorf("errorText(%q) = %q, want %q", c.err, got, c.want)
		}
	}
}

// A bad duration, number or switch names the flag and the expected format,
// and the flag package's "parse error" and full usage are not printed.
func TestFlagErrorsNameTheFormat(t *testing.T) {
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"sim", "--duration", "abc"}, `--duration "abc": want a duration such as 90s, 5m or 1h30m`},
		{[]string{"sim", "--devices", "ten"}, `--devices "ten": want a whole number`},
		{[]string{"sim", "--rate", "fast"}, `--rate "fast": want a number such as 2.5`},
		{[]string{"trend", "--step", "5"}, `--step "5": want a duration such as 90s, 5m or 1h30m`},
	}
	for _, c := range cases {
		code, _, stderr := runCmd(c.args...)
		if code != 2 || !strings.Contains(stderr, c.want) || strings.Contains(stderr, "parse error") || strings.Contains(stderr, "flags:") {
			t.Errorf("%v: exit %d, stderr %q; want exit 2 and %q alone", c.args, code, stderr, c.want)
		}
	}
}

// An unknown config key is named with the keys that are expected, never
// with a Go type; a value of the wrong kind says the format.
func TestServeConfigUnknownKeyNamesTheKeys(t *testing.T) {
	dir := t.TempDir()
	for body, want := range map[string]string{
		"http_port: 7401\n":  `line 1: unknown key "http_port", want one of data, grpc_listen, http_listen,`,
		"batch_delay: abc\n": `line 1: value "abc", want a duration such as 90s, 5m or 1h30m`,
		"trend_days: many\n": `line 1: value "many", want a whole number`,
	} {
		p := filepath.Join(dir, "c.yaml")
		if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
			t.Fatal(err)
		}
		code, _, stderr := runCmd("serve", "--config", p, "--data", dir)
		if code == 0 || !strings.Contains(stderr, want) || strings.Contains(stderr, "main.") || strings.Contains(stderr, "time.Duration") {
			t.Errorf("config %q: exit %d, stderr %q; want %q and no Go type", body, code, stderr, want)
		}
	}
}

// A trend of a device no gateway knows is NotFound, not an empty CSV with
// exit 0.
func TestTrendUnknownDeviceFails(t *testing.T) {
	addr := startQualityGateway(t, []string{"known-1"}, 5, nil)
	code, out, stderr := runCmd("trend", "--gateway", addr, "--device", "nosuch")
	if code != 1 || !strings.Contains(stderr, `NotFound: device "nosuch" is not known to `+addr) || strings.Count(strings.TrimSpace(stderr), "\n") != 0 {
		t.Errorf("exit %d, stderr %q; want exit 1 and one NotFound sentence", code, stderr)
	}
	if out != "" {
		t.Errorf("stdout %q; want nothing for a failed trend", out)
	}
	// A known device still answers (the check does not break the normal case).
	if code, out, stderr := runCmd("trend", "--gateway", addr, "--device", "known-1"); code != 0 || !strings.Contains(out, "known-1") {
		t.Errorf("known device: exit %d, stderr %q", code, stderr)
	}
}

// A simulated fleet that no gateway acknowledges exits 1 saying so (port 1
// on loopback: nothing listens there).
func TestSimNothingAcknowledgedFails(t *testing.T) {
	code, out, stderr := runCmd("sim", "--gateway", "127.0.0.1:1", "--devices", "1", "--duration", "500ms", "--drain", "500ms", "--progress-every", "1h")
	if code != 1 || !strings.Contains(stderr, "nothing acknowledged: the gateway at 127.0.0.1:1 confirmed none of") {
		t.Errorf("exit %d, stderr %q; want exit 1 and 'nothing acknowledged'", code, stderr)
	}
	if strings.Contains(stderr, "rpc error: code") {
		t.Errorf("stderr %q carries the transport prefix", stderr)
	}
	if !strings.Contains(out, `"frames_acked":0`) {
		t.Errorf("stdout %q; want the report line still written", out)
	}
}

// The camera recordings are float frame means (testdata/camera-oximetry,
// README there): by default estimate treats their resolution as unknown and
// says so, never withholding seconds as low_resolution; an explicit
// --adc-bits 16 on them is warned about by name; a run with more than half
// of its seconds withheld ends with the counts per flag.
func TestEstimateFloatInputAndWithheldWarning(t *testing.T) {
	in := filepath.Join("..", "..", "testdata", "camera-oximetry", "subject-1", "ppg_left.csv")
	code, out, stderr := runCmd("estimate", "--in", in, "--red-col", "r", "--ir-col", "g", "--flags")
	if code != 0 || !strings.Contains(stderr, "not whole numbers") || !strings.Contains(stderr, "ADC resolution treated as unknown") {
		t.Fatalf("default: exit %d, stderr %q; want a note that resolution is unknown", code, stderr)
	}
	if strings.Contains(out, "low_resolution") || strings.Contains(out, "clipping") {
		t.Error("default on float input: resolution/clipping checks ran")
	}
	code, _, stderr = runCmd("estimate", "--in", in, "--red-col", "r", "--ir-col", "g", "--adc-bits", "16")
	if code != 0 || !strings.Contains(stderr, "warning: --adc-bits 16 given but") {
		t.Errorf("--adc-bits 16: exit %d, stderr %q; want a warning naming --adc-bits", code, stderr)
	}
	// With 16 bits forced, every second is withheld (frame means near 40 of
	// 65,535 codes read as a sensor off): the warning gives the counts.
	if !strings.Contains(stderr, "warning: 1090 of 1090 seconds withheld (100 %): ") || !strings.Contains(stderr, "sensor_off 1090") {
		t.Errorf("--adc-bits 16: stderr %q; want the withheld warning with flag counts", stderr)
	}
}

// estimate and calibrate pairs read the same raw recordings: their
// --adc-bits default and help are the same.
func TestADCBitsDefaultsAgree(t *testing.T) {
	_, _, e1 := runCmd("estimate", "--help")
	_, _, e2 := runCmd("calibrate", "pairs", "--help")
	for name, help := range map[string]string{"estimate": e1, "calibrate pairs": e2} {
		if !strings.Contains(help, "-1 = auto") || !strings.Contains(help, "(default -1)") {
			t.Errorf("%s --help: --adc-bits default is not auto:\n%s", name, help)
		}
	}
}
