package main

import (
	"encoding/csv"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// Tune against reviews through a running gateway (--gateway: a snapshot of
// its store, reviews included). Each of bed-1..3 has one spo2_low episode:
// 30 s below 90 %, announced 15 s after onset by adult-ward-pilot. bed-1 is
// reviewed actionable, bed-2 artefact, bed-3 not at all. By hand:
//
//	delay 15s: all three raised again -> positives raised 1 of 1, negatives
//	           avoided 0 of 1, unreviewed alarms 1 (bed-3's);
//	delay 45s: none lasts 45 s -> raised 0 of 1, avoided 1 of 1, unreviewed 0.
func TestTuneAgainstReviewsThroughAGateway(t *testing.T) {
	gw := startEpisodeGateway(t, "bed-1", "bed-2", "bed-3")
	_, out, _ := runCmd("episodes", "--gateway", gw, "--format", "csv")
	ids := map[string]string{}
	for _, r := range readEpisodesCSV(t, out) {
		if r["condition"] == "spo2_low" {
			ids[r["device"]] = r["episode_id"]
		}
	}
	for dev, label := range map[string]string{"bed-1": "actionable", "bed-2": "artefact"} {
		if code, _, errOut := runCmd("review", "--gateway", gw, "--episode", ids[dev], "--label", label); code != 0 {
			t.Fatalf("review %s: %s", dev, errOut)
		}
	}
	dir := t.TempDir()
	grid := filepath.Join(dir, "grid.yaml")
	if err := os.WriteFile(grid, []byte("base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [15s, 45s]\nreference:\n"+
		"  reviews: {positive: [actionable], negative: [not-actionable, artefact]}\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	outDir := filepath.Join(dir, "out")
	code, stdout, stderr := runCmd("tune", "--grid", grid, "--gateway", gw, "--out", outDir)
	if code != 0 {
		t.Fatalf("tune: exit %d: %s", code, stderr)
	}
	if !strings.Contains(stdout, "1 positive (actionable), 1 negative (not-actionable, artefact), 0 reviewed otherwise") {
		t.Errorf("tune output lacks the reviewed counts:\n%s", stdout)
	}
	b, err := os.ReadFile(filepath.Join(outDir, "summary.csv"))
	if err != nil {
		t.Fatal(err)
	}
	rows, err := csv.NewReader(strings.NewReader(afterCaution(t, "summary.csv", string(b)))).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	col := map[string]int{}
	for i, c := range rows[0] {
		col[c] = i
	}
	want := map[string][5]string{ // reviewed_positive, positive_raised, reviewed_negative, negative_avoided, unreviewed_alarms
		"15s": {"1", "1", "1", "0", "1"},
		"45s": {"1", "0", "1", "1", "0"},
	}
	for _, r := range rows[1:] {
		w, ok := want[r[col["spo2_low.delay"]]]
		if !ok {
			t.Fatalf("unexpected row %v", r)
		}
		for i, c := range []string{"reviewed_positive", "positive_raised", "reviewed_negative", "negative_avoided", "unreviewed_alarms"} {
			if r[col[c]] != w[i] {
				t.Errorf("delay %s: %s = %q, want %s (worked above)", r[col["spo2_low.delay"]], c, r[col[c]], w[i])
			}
		}
		if r[col["ppv"]] != "" {
			t.Errorf("delay %s: ppv %q, want empty (undefined against reviews)", r[col["spo2_low.delay"]], r[col["ppv"]])
		}
	}
	if html, _ := os.ReadFile(filepath.Join(outDir, "report.html")); !strings.Contains(string(html), "Against the reviews") {
		t.Error("report.html lacks the reviews table")
	}
	// A trend CSV has no reviews: refused with the reason.
	code, _, stderr = runCmd("tune", "--grid", grid, "--in", grid, "--out", filepath.Join(dir, "x"))
	if code != 1 || !strings.Contains(stderr, "reference reviews: needs --data or --gateway") {
		t.Errorf("--in with reviews: exit %d, %q", code, stderr)
	}
}
