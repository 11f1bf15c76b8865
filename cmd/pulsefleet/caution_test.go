package main

import (
	"context"
	"encoding/json"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// afterCaution checks that a CSV or YAML output starts with the caution
// comment line (docs/contracts.md, "The caution on every output") and
// returns the rest, so a test can read the header and rows as before.
func afterCaution(t testing.TB, what, out string) string {
	t.Helper()
	rest, ok := strings.CutPrefix(out, caution.Comment)
	if !ok {
		t.Fatalf("%s does not start with the caution line %q:\n%.300s", what, caution.Comment, out)
	}
	return rest
}

// The trend command's CSV (points and steps) starts with the caution line,
// and replay's reader takes the points as they are.
func TestTrendOutputCarriesTheCaution(t *testing.T) {
	spo2, pulse := 95.0, 61.0
	var b strings.Builder
	if err := writeTrendPoints(&b, "bed-1", "", []*pb.TrendPoint{{TimeUnixMs: 1000, Spo2Pct: &spo2, PulseBpm: &pulse}}, true); err != nil {
		t.Fatal(err)
	}
	trends, err := alarms.ReadTrendCSV(strings.NewReader(afterCaution(t, "trend points", b.String())))
	if err != nil || len(trends) != 1 || len(trends[0].Samples) != 1 || trends[0].Samples[0].SpO2 != 95 {
		t.Errorf("trend points read back as %+v, %v", trends, err)
	}
	b.Reset()
	if err := writeBuckets(&b, "bed-1", "", []*pb.TrendBucket{{StartUnixMs: 0, Points: 1}}, true); err != nil {
		t.Fatal(err)
	}
	if rest := afterCaution(t, "trend steps", b.String()); !strings.HasPrefix(rest, "start_s,device,points") {
		t.Errorf("trend steps after the caution: %q", rest)
	}
}

// calibrate --format json carries the caution as a field.
func TestCalibrateJSONCarriesTheCaution(t *testing.T) {
	code, stdout, stderr := runCmd("calibrate", "--pairs", writeLinePairs(t), "--model", "linear", "--format", "json")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	var v map[string]any
	if err := json.Unmarshal([]byte(stdout), &v); err != nil {
		t.Fatal(err)
	}
	if v[caution.JSONKey] != caution.Text {
		t.Errorf("calibrate JSON %q = %v, want the caution", caution.JSONKey, v[caution.JSONKey])
	}
}

// estimate's reader skips '#' lines, so a raw file that starts with the
// caution line (or notes of the person who recorded it) is read as is.
func TestEstimateReaderSkipsCommentLines(t *testing.T) {
	in := caution.Comment + "# bench recording, finger probe\nred,ir\n"
	for i := 0; i < 200; i++ {
		in += "1000,900\n"
	}
	code, out, stderr := runCmdIn(in, "estimate", "--rate", "100")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	rows := strings.Split(strings.TrimSpace(afterCaution(t, "estimate output", out)), "\n")
	if rows[0] != "t_s,spo2_pct,pulse_bpm,pi_pct,sqi,ratio" || len(rows) != 3 {
		t.Errorf("estimate over 2 s after two comment lines: %q", rows)
	}
}

func runCmdIn(stdin string, args ...string) (code int, stdout, stderr string) {
	var o, e strings.Builder
	code = run(context.Background(), args, stdio{in: strings.NewReader(stdin), out: &o, err: &e})
	return code, o.String(), e.String()
}
