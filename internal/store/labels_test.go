package store

import (
	"maps"
	"testing"
)

// Operator labels: stored, replaced, removed; the bucket is made by the
// first label set (a store that never had one has none, so older binaries
// open it), and verify knows it.
func TestDeviceLabelsStoredAndVerified(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	got, err := db.DeviceLabels()
	if err != nil || len(got) != 0 {
		t.Fatalf("labels of a new store: %v, %v", got, err)
	}
	if err := db.SetDeviceLabels("d1", map[string]string{"bed": "4"}, &AuditEntry{Action: "device.labels"}); err != nil {
		t.Fatal(err)
	}
	if err := db.SetDeviceLabels("d2", map[string]string{"bed": "5"}, nil); err != nil {
		t.Fatal(err)
	}
	if err := db.SetDeviceLabels("d2", nil, nil); err != nil {
		t.Fatal(err)
	}
	got, err = db.DeviceLabels()
	if err != nil || len(got) != 1 || !maps.Equal(got["d1"], map[string]string{"bed": "4"}) {
		t.Fatalf("labels: %v, %v, want d1 bed=4 only", got, err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	rep, err := VerifyDir(dir, VerifyOptions{})
	if err != nil || !rep.OK() {
		t.Fatalf("verify a store with labels: %+v, %v", rep, err)
	}
}
