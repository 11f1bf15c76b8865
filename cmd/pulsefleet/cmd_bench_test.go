package main

import (
	"context"
	"encoding/json"
	"os"
	"strings"
	"testing"
)

// TestMain lets a test run this test binary as the pulsefleet command
// (PULSEFLEET_TEST_AS_MAIN=1), so `bench --client process` can start its
// load client as a real separate process in tests.
func TestMain(m *testing.M) {
	if os.Getenv("PULSEFLEET_TEST_AS_MAIN") == "1" {
		os.Exit(run(context.Background(), os.Args[1:], stdio{in: os.Stdin, out: os.Stdout, err: os.Stderr}))
	}
	os.Exit(m.Run())
}

func benchJSON(t *testing.T, args ...string) map[string]any {
	t.Helper()
	code, out, errs := simRun(t, args...)
	if code != 0 {
		t.Fatalf("bench exit %d: %s", code, errs)
	}
	lines := strings.Split(strings.TrimSpace(out), "\n")
	if len(lines) != 1 {
		t.Fatalf("stdout %q, want one JSON line", out)
	}
	var res map[string]any
	if err := json.Unmarshal([]byte(lines[0]), &res); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"sink_samples_per_s", "gateway_samples_per_s", "ratio", "ack_p50_ms", "ack_p99_ms", "lost", "peak_rss_bytes"} {
		if _, ok := res[k]; !ok {
			t.Errorf("bench JSON lacks %q: %s", k, lines[0])
		}
	}
	if !strings.Contains(errs, "bench: phase sink") || !strings.Contains(errs, "bench: phase gateway") {
		t.Errorf("no progress for both phases on stderr: %s", errs)
	}
	return res
}

// A small bench: both phases run, nothing acknowledged is missing from the
// gateway's store, and every figure is measured (no wall-clock bound is
// asserted: the machine is shared).
func TestBenchInProcess(t *testing.T) {
	res := benchJSON(t, "bench", "--devices", "20", "--rate", "100", "--duration", "2s", "--client", "in-process", "--progress-every", "1s")
	if res["lost"] != float64(0) || res["unacked_at_end"] != float64(0) {
		t.Errorf("lost %v, unacknowledged %v: want 0", res["lost"], res["unacked_at_end"])
	}
	if res["sink_samples_per_s"].(float64) <= 0 || res["gateway_samples_per_s"].(float64) <= 0 || res["peak_rss_bytes"].(float64) <= 0 {
		t.Errorf("figures not measured: %v", res)
	}
	if res["client_in_process"] != true {
		t.Errorf("client_in_process %v", res["client_in_process"])
	}
	// 20 devices sent for 2 s, so the gateway's store committed.
	if c, _ := res["commits_per_s"].(float64); c <= 0 {
		t.Errorf("commits_per_s %v, want the gateway's commits counted", res["commits_per_s"])
	}
}

func TestBenchClientProcess(t *testing.T) {
	t.Setenv("PULSEFLEET_TEST_AS_MAIN", "1") // the client process is this binary acting as pulsefleet
	res := benchJSON(t, "bench", "--devices", "10", "--duration", "1s", "--progress-every", "1s")
	if res["lost"] != float64(0) || res["client_in_process"] != false || res["client_peak_rss_bytes"].(float64) <= 0 {
		t.Errorf("result %v", res)
	}
}

func TestBenchUsage(t *testing.T) {
	for _, args := range [][]string{
		{"bench", "--devices", "0"}, {"bench", "--rate", "2000"}, {"bench", "--duration", "0s"}, {"bench", "--client", "thread"},
	} {
		if code, _, _ := simRun(t, args...); code != 2 {
			t.Errorf("%v: exit %d, want 2", args, code)
		}
	}
}
