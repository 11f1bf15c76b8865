package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// relayCmd runs the relay command in-process and decodes its JSON line.
func relayCmd(t *testing.T, ctx context.Context, stdin string, args ...string) (code int, rep relayReport, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	code = run(ctx, append([]string{"relay"}, args...), stdio{in: strings.NewReader(stdin), out: &out, err: &errb})
	return code, decodeRelayJSON(t, out.String(), errb.String()), errb.String()
}

func decodeRelayJSON(t *testing.T, stdout, stderr string) (rep relayReport) {
	t.Helper()
	lines := strings.Split(strings.TrimSpace(stdout), "\n")
	if last := lines[len(lines)-1]; last != "" {
		if err := json.Unmarshal([]byte(last), &rep); err != nil {
			t.Errorf("relay's last stdout line is not JSON: %q (%v); stderr:\n%s", last, err, stderr)
		}
	}
	return rep
}

func writeLines(t *testing.T, path string, lines []string) {
	t.Helper()
	if err := os.WriteFile(path, []byte(strings.Join(lines, "\n")+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
}

// ledgerOf opens a stopped gateway's store and returns the device's ingest
// ledger totals.
func ledgerOf(t *testing.T, dir, device string) store.LedgerTotal {
	t.Helper()
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	tot, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	return tot[device]
}

// Ten minutes of 100 Hz samples from a file go as fast as the gateway
// acknowledges them (a real-time run would take ten minutes; the test's
// own deadline is the only bound, no timing is asserted) and the JSON line
// balances: every line read is acknowledged or rejected with a reason.
func TestRelayFileGoesAtAcknowledgementSpeedAndBalances(t *testing.T) {
	addr, dir, stop := startTestGateway(t)
	in := filepath.Join(t.TempDir(), "ten-minutes.csv")
	lines := ppgLines(600, 100, 18, 7, true)
	writeLines(t, in, lines)
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	code, rep, stderr := relayCmd(t, ctx, "", "--gateway", addr, "--device", "relay-file", "--model", "proto-t",
		"--in", in, "--rate", "100", "--adc-bits", "18")
	if code != 0 {
		t.Fatalf("exit %d; stderr:\n%s", code, stderr)
	}
	t.Logf("%+v", rep)
	want := uint64(len(lines) - 1) // the header is not a sample
	if rep.LinesRead != want || rep.SamplesAcked != want || rep.LinesRejected != 0 || rep.Unacked != 0 {
		t.Errorf("read %d, acked %d, rejected %d, unacked %d; want %d read and acked", rep.LinesRead, rep.SamplesAcked, rep.LinesRejected, rep.Unacked, want)
	}
	if rep.LinesRead+rep.FromSpool != rep.SamplesAcked+rep.LinesRejected {
		t.Errorf("JSON line does not balance: %+v", rep)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	l := ledgerOf(t, dir, "relay-file")
	if l.Samples != want || !l.Distinct {
		t.Errorf("store ledger %+v, want %d samples, each sequence once", l, want)
	}
}
