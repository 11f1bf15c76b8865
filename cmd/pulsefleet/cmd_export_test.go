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

// exportFixture writes 2 devices x 60 s of 1 Hz trend (invented values) into
// a data directory and closes the store.
func exportFixture(t *testing.T) (dir string, t0 time.Time) {
	t.Helper()
	dir = t.TempDir()
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	t0 = time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC)
	b := &store.Batch{Devices: []*store.Device{{ID: "ward1-bed1"}, {ID: "ward1-bed2"}}}
	for _, d := range b.Devices {
		for i := int64(0); i < 60; i++ {
			b.Points = append(b.Points, store.Point{Device: d.ID, TimeMS: t0.UnixMilli() + i*1000, SpO2: 96, Pulse: 64, PI: 2, SQI: 0.8, Ratio: 0.55, Source: 2})
		}
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	return dir, t0
}

func exportRun(t *testing.T, args ...string) (int, string, string) {
	t.Helper()
	var out, errb bytes.Buffer
	code := run(context.Background(), append([]string{"export"}, args...), stdio{in: strings.NewReader(""), out: &out, err: &errb})
	return code, out.String(), errb.String()
}

func TestExportCommandCSVAndRanges(t *testing.T) {
	dir, t0 := exportFixture(t)
	code, out, errs := exportRun(t, "--data", dir, "--format", "csv")
	lines := strings.Split(strings.TrimSpace(afterCaution(t, "export CSV", out)), "\n")
	if code != 0 || len(lines) != 121 || lines[0] != "t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi,ratio,flags,source,participant" {
		t.Fatalf("exit %d, %d lines, header %q, stderr %q", code, len(lines), lines[0], errs)
	}
	if errs != "" {
		t.Errorf("stderr is not a terminal, yet got %q", errs)
	}
	// The same 20 s range given as RFC 3339 and as Unix seconds
	// (1796076010 = 2026-11-30T22:00:10Z, checked with date -u -d @1796076010).
	from, to := t0.Add(10*time.Second), t0.Add(30*time.Second)
	_, a, _ := exportRun(t, "--data", dir, "--format", "csv", "--device", "ward1-bed2", "--from", from.Format(time.RFC3339), "--to", to.Format(time.RFC3339))
	_, b, _ := exportRun(t, "--data", dir, "--format", "csv", "--device=ward1-bed2", "--from", "1796076010", "--to", "1796076030.0")
	if a != b || strings.Count(afterCaution(t, "export CSV", a), "\n") != 21 || !strings.Contains(a, "\n1796076010,ward1-bed2,96,64,2,0.8,0.55,0,device,\n") {
		t.Errorf("ranges differ or are wrong:\nRFC 3339:\n%s\nUnix:\n%s", a, b)
	}
}

func TestExportCommandFHIRToFile(t *testing.T) {
	dir, _ := exportFixture(t)
	dst := filepath.Join(t.TempDir(), "bundle.json")
	code, out, errs := exportRun(t, "--data", dir, "--format", "fhir", "--device", "ward1-bed1", "--out", dst, "--no-pi")
	if code != 0 || out != "" {
		t.Fatalf("exit %d, stdout %q, stderr %q", code, out, errs)
	}
	raw, err := os.ReadFile(dst)
	if err != nil {
		t.Fatal(err)
	}
	var bundle struct {
		ResourceType, Type, Timestamp string
		Entry                         []json.RawMessage
	}
	if err := json.Unmarshal(raw, &bundle); err != nil {
		t.Fatalf("not JSON: %v", err)
	}
	// 1 Device + 60 x (SpO2, pulse rate); --no-pi drops perfusion index.
	if bundle.ResourceType != "Bundle" || bundle.Type != "collection" || len(bundle.Entry) != 121 || bundle.Timestamp == "" {
		t.Errorf("bundle %s/%s with %d entries, timestamp %q", bundle.ResourceType, bundle.Type, len(bundle.Entry), bundle.Timestamp)
	}
	if fi, _ := os.Stat(dst); fi.Mode().Perm() != 0o600 {
		t.Errorf("export file mode %v, want 0600", fi.Mode().Perm())
	}
}

// While a gateway holds the store (here: this test, read-write), export
// fails with a message that says what to do, and leaves no partial file.
func TestExportCommandLockedStore(t *testing.T) {
	dir, _ := exportFixture(t)
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	outDir := t.TempDir()
	code, _, errs := exportRun(t, "--data", dir, "--format", "csv", "--wait", "50ms", "--out", filepath.Join(outDir, "x.csv"))
	if code != 1 || !strings.Contains(errs, "export through it with 'pulsefleet export --gateway ADDR'") || !strings.Contains(errs, "locked") {
		t.Errorf("exit %d, stderr %q", code, errs)
	}
	if ents, _ := os.ReadDir(outDir); len(ents) != 0 {
		t.Errorf("left files behind: %v", ents)
	}
}

func TestExportCommandErrors(t *testing.T) {
	dir, _ := exportFixture(t)
	outDir := t.TempDir()
	for _, tc := range []struct {
		name string
		args []string
		code int
		want string
	}{
		{"no data", []string{"--format", "csv"}, 2, "--data, --gateway: give exactly one"},
		{"bad format", []string{"--data", dir, "--format", "xml"}, 2, `--format "xml", want csv or fhir`},
		{"bad time", []string{"--data", dir, "--format", "csv", "--from", "yesterday"}, 2, `--from "yesterday", want RFC 3339`},
		{"reversed range", []string{"--data", dir, "--format", "csv", "--from", "20", "--to", "10"}, 2, "--to 10 is not after --from 20"},
		{"no store", []string{"--data", filepath.Join(dir, "nope"), "--format", "csv"}, 1, "no such file"},
		{"unknown device", []string{"--data", dir, "--format", "fhir", "--device", "ward7-bed9", "--out", filepath.Join(outDir, "y.json")}, 1, `device "ward7-bed9" is not in the store`},
	} {
		t.Run(tc.name, func(t *testing.T) {
			code, _, errs := exportRun(t, tc.args...)
			if code != tc.code || !strings.Contains(errs, tc.want) {
				t.Errorf("exit %d, stderr %q; want exit %d and %q", code, errs, tc.code, tc.want)
			}
		})
	}
	if ents, _ := os.ReadDir(outDir); len(ents) != 0 {
		t.Errorf("a failed export left files behind: %v", ents)
	}
}

func TestExportHelpNamesBothSources(t *testing.T) {
	code, _, errs := exportRun(t, "--help")
	if code != 0 || !strings.Contains(errs, "--gateway ADDR[,ADDR...]") || !strings.Contains(errs, "byte for byte") || !strings.Contains(errs, "--format") {
		t.Errorf("exit %d, help %q", code, errs)
	}
}
