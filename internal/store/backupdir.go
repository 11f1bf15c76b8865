package store

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"time"
)

// Scheduled backups go into one directory as pulsefleet-TIME.db (TIME in
// UTC, 20060102T150405Z, so names sort by age) with their .sha256 files;
// retention keeps the newest N complete ones.

const (
	backupPrefix = "pulsefleet-"
	backupSuffix = ".db"
	backupStamp  = "20060102T150405Z"
)

// BackupName is the file name of a scheduled backup taken at t.
func BackupName(t time.Time) string { return backupPrefix + t.UTC().Format(backupStamp) + backupSuffix }

// DirBackup is one complete backup in a backup directory.
type DirBackup struct {
	Path  string
	Taken time.Time // from the name
}

// ListBackups returns the complete backups in dir (named by BackupName, with
// their checksum file), oldest first. Temporary files of backups in
// progress or cut short are not listed.
func ListBackups(dir string) ([]DirBackup, error) {
	ents, err := os.ReadDir(dir)
	if err != nil {
		return nil, fmt.Errorf("backups in %s: %w", dir, err)
	}
	have := map[string]bool{}
	for _, e := range ents {
		have[e.Name()] = true
	}
	var out []DirBackup
	for _, e := range ents {
		n := e.Name()
		if !e.Type().IsRegular() || !strings.HasPrefix(n, backupPrefix) || !strings.HasSuffix(n, backupSuffix) || !have[n+ChecksumSuffix] {
			continue
		}
		t, err := time.Parse(backupStamp, strings.TrimSuffix(strings.TrimPrefix(n, backupPrefix), backupSuffix))
		if err != nil {
			continue
		}
		out = append(out, DirBackup{Path: filepath.Join(dir, n), Taken: t})
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Taken.Before(out[j].Taken) })
	return out, nil
}

// ctxWriter fails writes once ctx is done, so a snapshot stops at shutdown.
type ctxWriter struct {
	ctx context.Context
	w   *BackupFile
}

func (c ctxWriter) Write(p []byte) (int, error) {
	if err := c.ctx.Err(); err != nil {
		return 0, err
	}
	return c.w.Write(p)
}

// BackupToDir takes a snapshot of db into dir as BackupName(now) (with its
// checksum file), then removes the oldest complete backups beyond keep (and
// leftover temporary files of cut backups). It returns the new backup's
// path and size.
func (db *DB) BackupToDir(ctx context.Context, dir string, keep int, now time.Time) (string, int64, error) {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return "", 0, fmt.Errorf("backup: %w", err)
	}
	path := filepath.Join(dir, BackupName(now))
	bf, err := CreateBackupFile(path)
	if err != nil {
		return "", 0, err
	}
	n, err := db.Snapshot(ctxWriter{ctx, bf}, nil)
	if err != nil {
		bf.Abort()
		return "", 0, err
	}
	if _, err := bf.Commit(""); err != nil {
		return "", 0, err
	}
	if err := pruneBackups(dir, keep, filepath.Base(bf.tmp)); err != nil {
		return path, n, err
	}
	return path, n, nil
}

// pruneBackups keeps the newest keep complete backups of dir and removes
// temporary files of cut backups (but not the one named current).
func pruneBackups(dir string, keep int, current string) error {
	bs, err := ListBackups(dir)
	if err != nil {
		return err
	}
	var first error
	for i := 0; i < len(bs)-keep; i++ {
		for _, p := range []string{bs[i].Path, bs[i].Path + ChecksumSuffix} {
			if err := os.Remove(p); err != nil && first == nil {
				first = fmt.Errorf("backup retention: %w", err)
			}
		}
	}
	ents, _ := os.ReadDir(dir)
	for _, e := range ents {
		n := e.Name()
		if strings.HasPrefix(n, "."+backupPrefix) && strings.HasSuffix(n, ".partial") && n != current {
			os.Remove(filepath.Join(dir, n))
		}
	}
	return first
}
