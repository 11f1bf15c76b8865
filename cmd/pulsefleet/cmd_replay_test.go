package main

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

func replayRun(t *testing.T, stdin string, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	code = run(context.Background(), args, stdio{in: strings.NewReader(stdin), out: &out, err: &errb})
	return code, out.String(), errb.String()
}

// The replay command reproduces the hand-worked episodes of the contract
// (alarms/testdata/ward-replay.csv explains each row).
func TestReplayCommandHandWorked(t *testing.T) {
	td := filepath.Join("..", "..", "alarms", "testdata")
	want, err := os.ReadFile(filepath.Join(td, "ward-replay.expected.csv"))
	if err != nil {
		t.Fatal(err)
	}
	code, out, errs := replayRun(t, "", "replay", "--profile", filepath.Join(td, "ward-replay.yaml"), "--in", filepath.Join(td, "ward-replay.csv"))
	if code != 0 || afterCaution(t, "replay output", out) != string(want) {
		t.Fatalf("exit %d, stderr %q\ngot:\n%s\nwant the caution line, then:\n%s", code, errs, out, want)
	}
	// Same through stdin and --out FILE.
	in, _ := os.ReadFile(filepath.Join(td, "ward-replay.csv"))
	dst := filepath.Join(t.TempDir(), "episodes.csv")
	code, _, errs = replayRun(t, string(in), "replay", "--profile", filepath.Join(td, "ward-replay.yaml"), "--in", "-", "--out", dst)
	got, _ := os.ReadFile(dst)
	if code != 0 || afterCaution(t, "replay --out file", string(got)) != string(want) {
		t.Fatalf("--in - --out FILE: exit %d, stderr %q, got:\n%s", code, errs, got)
	}
}

// ODI worked example (docs/references.md, desaturation indices, seen): 30 events
// in 7.5 h of valid recording -> ODI 4.0 /h. Built as a 1 Hz trend of
// 27001 samples (27000 s = 7.5 h of intervals) at 96 % with 30 dips to 92 %
// (a 4-point drop, 30 s each, every 15 minutes): both the 3 % and the 4 %
// index count 30 events. The dips stay above 90 %, so T90 = 0.
func TestReplayCommandIndicesWorkedExample(t *testing.T) {
	var b strings.Builder
	b.WriteString("t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi\n")
	for i := 0; i <= 27000; i++ { // 7.5 h = 27000 s of intervals
		v := "96"
		if k := i % 900; i < 27000 && k >= 300 && k < 330 {
			v = "92"
		}
		b.WriteString(strings.Join([]string{strconv.Itoa(i), "home-7", v, "60", "", ""}, ",") + "\n")
	}
	dir := t.TempDir()
	in := filepath.Join(dir, "trend.csv")
	if err := os.WriteFile(in, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	code, out, errs := replayRun(t, "", "replay", "--profile", "home-overnight", "--in", in, "--out", filepath.Join(dir, "ep.csv"), "--indices", "-")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	want := "device,valid_hours,events_3pct,odi_3pct_per_h,events_4pct,odi_4pct_per_h,t90_pct\n" +
		"home-7,7.500,30,4.00,30,4.00,0.00\n"
	if afterCaution(t, "replay --indices output", out) != want {
		t.Errorf("indices:\n%s\nwant:\n%s", out, want)
	}
}

func TestReplayCommandErrors(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.yaml")
	os.WriteFile(bad, []byte("name: x\nconditions:\n  - kind: spo2_low\n    limit: 90\n    delay: -5s\n    priority: low\n"), 0o644)
	trend := filepath.Join(dir, "t.csv")
	os.WriteFile(trend, []byte("t_s,spo2_pct\n0,95\n"), 0o644)
	for _, tc := range []struct {
		name string
		args []string
		code int
		want string
	}{
		{"no profile", []string{"replay", "--in", trend}, 2, "--profile is required"},
		{"no input", []string{"replay", "--profile", "home-overnight"}, 2, "--in is required"},
		{"both on stdout", []string{"replay", "--profile", "home-overnight", "--in", trend, "--indices", "-"}, 2, "give --out FILE"},
		{"bad profile value", []string{"replay", "--profile", bad, "--in", trend}, 1, "conditions[0].delay: -5s, want >= 0"},
		{"unknown profile", []string{"replay", "--profile", "icu-night", "--in", trend}, 1, "no built-in profile"},
		{"help", []string{"replay", "--help"}, 0, "Denominator: valid recording time"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			code, _, errs := replayRun(t, "", tc.args...)
			if code != tc.code || !strings.Contains(errs, tc.want) {
				t.Errorf("exit %d, stderr %q; want exit %d and %q", code, errs, tc.code, tc.want)
			}
		})
	}
}
