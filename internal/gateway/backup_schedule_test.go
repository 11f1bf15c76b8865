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
	id := h.db.ID()
	// The schedule keeps running while the test looks, so each step of one
	// backup (commit, prune, gauge, audit entry) is awaited by polling for its
	// own effect, and the files are checked only after the gateway stopped:
	// until then the next backup may add a third file or prune one being read.
	var first store.DirBackup
	var done int
	deadline := time.Now().Add(60 * time.Second)
	for ; ; time.Sleep(100 * time.Millisecond) {
		bs, _ := store.ListBackups(dir)
		if first.Path == "" && len(bs) > 0 {
			first = bs[0]
		}
		es, _ := h.db.Audit(0, "backup.done", 0)
		done = len(es)
		_, err := os.Stat(first.Path)
		if first.Path != "" && os.IsNotExist(err) && done >= 3 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("after 60 s: backups %+v, first %q, %d backup.done audit entries; want the first pruned after 3 backups",
				bs, first.Path, done)
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
	// Each backup sets the gauge before its audit entry, so the gauge has
	// reached the third backup, taken two intervals (or more) after the first.
	v, _ := strconv.ParseFloat(g[1], 64)
	if v < float64(first.Taken.Unix()+2) || v > float64(time.Now().Unix()) {
		t.Errorf("last success %v, want the third backup's time, 2 s or more after the first %v", v, first.Taken.Unix())
	}
	h.stop()

	bs, _ := store.ListBackups(dir)
	if len(bs) != 2 {
		t.Fatalf("%d complete backups, want 2 (--backup-keep 2)", len(bs))
	}
	if _, err := os.Stat(first.Path); !os.IsNotExist(err) {
		t.Errorf("retention kept %s past 2 newer ones", first.Path)
	}
	if _, err := os.Stat(leftover); !os.IsNotExist(err) {
		t.Errorf("the cut backup's temporary file is still there")
	}
	for _, b := range bs {
		rep, err := store.VerifyFile(b.Path, store.VerifyOptions{})
		if err != nil || !rep.OK() || rep.StoreID != id {
			t.Errorf("%s: %v %+v", b.Path, err, rep)
		}
		sum, _ := store.FileSHA256(b.Path)
		if rec, err := store.ReadChecksumFile(b.Path); err != nil || rec != sum {
			t.Errorf("%s: checksum file %q %v, file hashes to %s", b.Path, rec, err, sum)
		}
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
