package gateway

import (
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Scheduled backups: every interval a complete snapshot that passes the
// full check; retention keeps the newest N; the last-success gauge follows
// and the interval gauge says the schedule; a cut backup's temporary file is
// cleaned up and never listed.
func TestScheduledBackupsAndRetention(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "backups")
	os.MkdirAll(dir, 0o700)
	// A temporary file left by a backup cut short (a process killed).
	leftover := filepath.Join(dir, ".pulsefleet-20261201T000000Z.db.123.partial")
	os.WriteFile(leftover, []byte("cut"), 0o600)
	h := newHarness(t, func(o *Options) { o.Backups = BackupSchedule{Dir: dir, Every: time.Second, Keep: 2} })
	var bs []store.DirBackup
	deadline := time.Now().Add(60 * time.Second)
	for time.Now().Before(deadline) {
		bs, _ = store.ListBackups(dir)
		if len(bs) == 2 && bs[1].Taken.Sub(bs[0].Taken) >= time.Second {
			if _, err := os.Stat(leftover); err != nil { // pruned after the second one at least
				break
			}
		}
		time.Sleep(100 * time.Millisecond)
	}
	// Wait for one more, so retention has had to remove one.
	first := bs[0].Path
	for time.Now().Before(deadline) {
		if _, err := os.Stat(first); os.IsNotExist(err) {
			break
		}
		time.Sleep(100 * time.Millisecond)
	}
	bs, _ = store.ListBackups(dir)
	if len(bs) != 2 {
		t.Fatalf("%d complete backups, want 2 (--backup-keep 2)", len(bs))
	}
	if _, err := os.Stat(first); !os.IsNotExist(err) {
		t.Errorf("retention kept %s past 2 newer ones", first)
	}
	if _, err := os.Stat(leftover); !os.IsNotExist(err) {
		t.Errorf("the cut backup's temporary file is still there")
	}
	for _, b := range bs {
		rep, err := store.VerifyFile(b.Path, store.VerifyOptions{})
		if err != nil || !rep.OK() || rep.StoreID != h.db.ID() {
			t.Errorf("%s: %v %+v", b.Path, err, rep)
		}
		sum, _ := store.FileSHA256(b.Path)
		if rec, err := store.ReadChecksumFile(b.Path); err != nil || rec != sum {
			t.Errorf("%s: checksum file %q %v, file hashes to %s", b.Path, rec, err, sum)
		}
	}
	m := h.metrics(t)
	if !regexp.MustCompile(`(?m)^pulsefleet_backup_interval_seconds 1$`).MatchString(m) {
		t.Errorf("interval gauge missing or wrong")
	}
	g := regexp.MustCompile(`(?m)^pulsefleet_backup_last_success_timestamp_seconds (\S+)$`).FindStringSubmatch(m)
	if g == nil {
		t.Fatal("last-success gauge missing")
	}
	v, _ := strconv.ParseFloat(g[1], 64)
	if v < float64(bs[0].Taken.Unix()) || v > float64(time.Now().Unix()) {
		t.Errorf("last success %v, want at or after the older kept backup %v", v, bs[0].Taken.Unix())
	}
	if es, _ := h.db.Audit(0, "backup.done", 0); len(es) < 3 {
		t.Errorf("%d backup.done audit entries, want one per scheduled backup (3 or more)", len(es))
	}
}

func TestBackupScheduleBounds(t *testing.T) {
	for _, s := range []BackupSchedule{{Dir: "d", Every: time.Millisecond, Keep: 1}, {Dir: "d", Every: time.Hour, Keep: 0}} {
		if s.Validate() == nil {
			t.Errorf("%+v accepted", s)
		}
	}
	if (BackupSchedule{}).Validate() != nil || (BackupSchedule{Dir: "d", Every: time.Hour, Keep: 7}).Validate() != nil {
		t.Error("valid schedules refused")
	}
}
