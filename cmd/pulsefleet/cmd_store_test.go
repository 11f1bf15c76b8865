package main

import (
	"encoding/json"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// seedCLIStore holds 20 devices x 400 trend points and 400 ledger messages.
func TestStoreStatsCountsTheSeededStore(t *testing.T) {
	dir := seedCLIStore(t)
	code, out, errOut := runCmd("store", "stats", "--data", dir, "--format", "json")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	var st store.Stats
	if err := json.Unmarshal([]byte(out), &st); err != nil {
		t.Fatal(err)
	}
	if st.TrendPoints != 8000 || st.Kind("ledger").Items != 8000 || st.Kind("audit").Records != 600 {
		t.Errorf("trend %d, ledger %d, audit %d; want 8000, 8000, 600", st.TrendPoints, st.Kind("ledger").Items, st.Kind("audit").Records)
	}
	code, out, errOut = runCmd("store", "stats", "--data", dir)
	if code != 0 || !strings.Contains(out, "ledger") || !strings.Contains(out, "(free pages)") || !strings.Contains(out, "BYTES/DEVICE-DAY") {
		t.Errorf("exit %d, text output:\n%s%s", code, out, errOut)
	}
	if code, _, errOut = runCmd("store", "stats"); code == 0 || !strings.Contains(errOut, "--data") {
		t.Errorf("without --data: exit %d, %s", code, errOut)
	}
}

// Through a running gateway (AdminService.GetStoreStats) store stats counts
// the same as from the stopped gateway's data directory.
func TestStoreStatsThroughTheGateway(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	dir := seedCLIStore(t)
	code, out, errOut := runCmd("store", "stats", "--data", dir, "--format", "json")
	if code != 0 {
		t.Fatalf("--data: exit %d: %s", code, errOut)
	}
	var local store.Stats
	if err := json.Unmarshal([]byte(out), &local); err != nil {
		t.Fatal(err)
	}
	c := startServe(t, dir)
	code, out, errOut = runCmd("store", "stats", "--gateway", c.grpcAddr, "--format", "json")
	if code != 0 {
		t.Fatalf("--gateway: exit %d: %s", code, errOut)
	}
	var remote store.Stats
	if err := json.Unmarshal([]byte(out), &remote); err != nil {
		t.Fatal(err)
	}
	if remote.TrendPoints != local.TrendPoints || remote.Kind("ledger").Items != local.Kind("ledger").Items ||
		remote.Kind("audit").Records < local.Kind("audit").Records || remote.Kind("trend").Bytes == 0 {
		t.Errorf("through the gateway %+v, from the directory %+v", remote, local)
	}
	if code, _, errOut = runCmd("store", "stats", "--gateway", c.grpcAddr, "--data", dir); code == 0 || !strings.Contains(errOut, "give one") {
		t.Errorf("both --data and --gateway: exit %d, %s", code, errOut)
	}
}
