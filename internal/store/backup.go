package store

import (
	"bufio"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"hash"
	"io"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"time"

	bolt "go.etcd.io/bbolt"
)

// Backups: a consistent snapshot of the live store (Snapshot), the file a
// snapshot is written into (BackupFile: temporary name, fsync, rename,
// checksum file) and putting a snapshot back in place of a data directory's
// store (Restore).

// SnapshotInfo describes a snapshot as it begins.
type SnapshotInfo struct {
	Size    int64     // bytes Snapshot will write
	StoreID string    // meta/store_id
	Taken   time.Time // when its read transaction began
}

// Snapshot writes a consistent copy of the whole store file to w, taken in
// one read transaction (bbolt's Tx.WriteTo): writers go on committing while
// it runs, and the copy holds exactly what was committed when it began, so
// every message acknowledged before then is in it. begin is called once,
// before the first byte, with the snapshot's size. The read transaction
// stays open until the copy is written, and bbolt cannot reuse pages freed
// meanwhile: a slow w makes the live file grow by what is written during
// the copy.
func (db *DB) Snapshot(w io.Writer, begin func(SnapshotInfo) error) (int64, error) {
	var n int64
	err := db.view(func(tx *bolt.Tx) error {
		info := SnapshotInfo{Size: tx.Size(), StoreID: db.id, Taken: time.Now()}
		if begin != nil {
			if err := begin(info); err != nil {
				return err
			}
		}
		var err error
		n, err = tx.WriteTo(w)
		return err
	})
	if err != nil {
		return n, fmt.Errorf("store: snapshot of %s: %w", db.path, err)
	}
	return n, nil
}

// ChecksumSuffix names the checksum file written beside a backup: FILE.sha256
// holds "HEX  NAME\n", the format sha256sum -c reads.
const ChecksumSuffix = ".sha256"

// BackupFile is a backup being written: bytes go to a temporary file in
// the target's directory (mode 0600: it holds health data and credential
// hashes) and become the target only when Commit has checked the SHA-256,
// synced the file and renamed it. A failed or interrupted backup (Abort,
// or a process killed) never leaves a partial file under the target's name.
type BackupFile struct {
	path, tmp string
	f         *os.File
	w         *bufio.Writer
	h         hash.Hash
	n         int64
}

// CreateBackupFile starts a backup to path.
func CreateBackupFile(path string) (*BackupFile, error) {
	if fi, err := os.Stat(path); err == nil && fi.IsDir() {
		return nil, fmt.Errorf("backup %s: is a directory, want a file name", path)
	}
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.partial")
	if err != nil {
		return nil, fmt.Errorf("backup %s: %w", path, err)
	}
	if err := f.Chmod(0o600); err != nil {
		f.Close()
		os.Remove(f.Name())
		return nil, fmt.Errorf("backup %s: %w", path, err)
	}
	return &BackupFile{path: path, tmp: f.Name(), f: f, w: bufio.NewWriterSize(f, 1<<20), h: sha256.New()}, nil
}

// Write appends p to the backup.
func (b *BackupFile) Write(p []byte) (int, error) {
	b.h.Write(p)
	n, err := b.w.Write(p)
	b.n += int64(n)
	if err != nil {
		return n, fmt.Errorf("backup %s: %w", b.path, err)
	}
	return n, nil
}

// Size is the number of bytes written so far.
func (b *BackupFile) Size() int64 { return b.n }

// Sum is the SHA-256 of the bytes written so far, lower-case hex.
func (b *BackupFile) Sum() string { return hex.EncodeToString(b.h.Sum(nil)) }

// Commit completes the backup: when wantSHA is not empty it must equal the
// SHA-256 of what was written; the file is synced and renamed to the
// target, then the checksum file is written the same way. On error nothing
// is left under the target's name that was not there before.
func (b *BackupFile) Commit(wantSHA string) (string, error) {
	sum := b.Sum()
	if wantSHA != "" && !strings.EqualFold(wantSHA, sum) {
		b.Abort()
		return "", fmt.Errorf("backup %s: checksum mismatch: received bytes hash to %s, the gateway sent %s", b.path, sum, wantSHA)
	}
	err := b.w.Flush()
	if err == nil {
		err = b.f.Sync()
	}
	if cerr := b.f.Close(); err == nil {
		err = cerr
	}
	b.f = nil
	if err == nil {
		err = os.Rename(b.tmp, b.path)
	}
	if err != nil {
		os.Remove(b.tmp)
		return "", fmt.Errorf("backup %s: %w", b.path, err)
	}
	line := sum + "  " + filepath.Base(b.path) + "\n"
	if err := writeFileAtomic(b.path+ChecksumSuffix, []byte(line)); err != nil {
		return "", fmt.Errorf("backup %s: checksum file: %w", b.path, err)
	}
	return sum, nil
}

// Abort removes the temporary file.
func (b *BackupFile) Abort() {
	if b.f != nil {
		b.f.Close()
		b.f = nil
	}
	os.Remove(b.tmp)
}

// writeFileAtomic writes data to path through a synced temporary file, mode
// 0600, and syncs the directory.
func writeFileAtomic(path string, data []byte) error {
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.partial")
	if err != nil {
		return err
	}
	tmp := f.Name()
	_, err = f.Write(data)
	if err == nil {
		err = f.Chmod(0o600)
	}
	if err == nil {
		err = f.Sync()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(tmp, path)
	}
	if err != nil {
		os.Remove(tmp)
		return err
	}
	syncDir(filepath.Dir(path))
	return nil
}

func syncDir(dir string) {
	if d, err := os.Open(dir); err == nil {
		_ = d.Sync()
		d.Close()
	}
}

// ReadChecksumFile returns the SHA-256 recorded in path+".sha256", or ""
// when there is no such file.
func ReadChecksumFile(path string) (string, error) {
	b, err := os.ReadFile(path + ChecksumSuffix)
	if errors.Is(err, os.ErrNotExist) {
		return "", nil
	}
	if err != nil {
		return "", err
	}
	f := strings.Fields(string(b))
	if len(f) == 0 || len(f[0]) != 64 {
		return "", fmt.Errorf("%s%s: not a SHA-256 line (want 64 hex digits, two spaces, the file name)", path, ChecksumSuffix)
	}
	return strings.ToLower(f[0]), nil
}

// FileSHA256 hashes a file.
func FileSHA256(path string) (string, error) {
	f, err := os.Open(path)
	if err != nil {
		return "", err
	}
	defer f.Close()
	h := sha256.New()
	if _, err := io.Copy(h, f); err != nil {
		return "", err
	}
	return hex.EncodeToString(h.Sum(nil)), nil
}

// RestoreResult says what Restore did.
type RestoreResult struct {
	StoreID    string // the restored store's id
	Records    map[string]int64
	KeptAside  string // the previous store file, renamed ("" when there was none)
	IdentAside string // the previous identity file, renamed ("" when there was none or it matched)
	SHA256     string // the snapshot's SHA-256
}

// Restore puts the snapshot file from in place of the store of data
// directory dir. The gateway must be stopped: Restore takes the store file's
// lock and refuses (ErrLocked) while a gateway holds it. The snapshot must
// pass the full check (VerifyFile) and, when from.sha256 exists, match its
// checksum, before anything in dir changes. The previous store file and an
// identity file naming another store are kept aside under
// NAME.before-restore-TIME; the identity file then names the restored store.
func Restore(dir, from string, opt VerifyOptions, now time.Time) (*RestoreResult, error) {
	rep, sum, err := checkSnapshot(from, opt)
	if err != nil {
		return nil, err
	}
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return nil, fmt.Errorf("restore: --data %s: %w", dir, err)
	}
	path := filepath.Join(dir, FileName)
	// Hold the store's lock (the same flock bbolt takes) while replacing it.
	_, serr := os.Stat(path)
	created := errors.Is(serr, os.ErrNotExist)
	lock, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o600)
	if err != nil {
		return nil, fmt.Errorf("restore: %w", err)
	}
	defer lock.Close()
	done := false
	defer func() {
		if created && !done {
			os.Remove(path) // the empty file made only to take the lock
		}
	}()
	if err := syscall.Flock(int(lock.Fd()), syscall.LOCK_EX|syscall.LOCK_NB); err != nil {
		return nil, fmt.Errorf("restore: %s: %w", path, ErrLocked)
	}
	lfi, err := lock.Stat()
	if err != nil {
		return nil, fmt.Errorf("restore: %w", err)
	}
	res := &RestoreResult{StoreID: rep.StoreID, Records: rep.Records, SHA256: sum}
	stamp := now.UTC().Format("20060102T150405Z")

	// Copy the snapshot beside the store, synced, before touching the store.
	tmp := path + ".restore.partial"
	if err := copyFileSynced(from, tmp); err != nil {
		os.Remove(tmp)
		return nil, fmt.Errorf("restore: copy %s: %w", from, err)
	}
	if got, err := FileSHA256(tmp); err != nil || got != sum {
		os.Remove(tmp)
		return nil, fmt.Errorf("restore: the copy in %s does not hash like %s (%v): nothing was changed", tmp, from, err)
	}
	if lfi.Size() > 0 {
		res.KeptAside = path + ".before-restore-" + stamp
		if err := os.Link(path, res.KeptAside); err != nil {
			os.Remove(tmp)
			return nil, fmt.Errorf("restore: keep the old store aside as %s: %w", res.KeptAside, err)
		}
	}
	if err := os.Rename(tmp, path); err != nil {
		os.Remove(tmp)
		return nil, fmt.Errorf("restore: %w", err)
	}
	done = true
	if err := restoreIdentity(dir, rep.StoreID, stamp, now, res); err != nil {
		return nil, err
	}
	syncDir(dir)
	return res, nil
}

// checkSnapshot checks a snapshot before Restore touches anything: a file,
// matching its checksum file when there is one, passing the full check, with
// a store id. It returns the check's report and the file's SHA-256.
func checkSnapshot(from string, opt VerifyOptions) (*VerifyReport, string, error) {
	fi, err := os.Stat(from)
	if err != nil {
		return nil, "", fmt.Errorf("restore: --from %s: %w", from, err)
	}
	if fi.IsDir() {
		return nil, "", fmt.Errorf("restore: --from %s is a directory, want a snapshot file", from)
	}
	want, err := ReadChecksumFile(from)
	if err != nil {
		return nil, "", fmt.Errorf("restore: %w", err)
	}
	sum, err := FileSHA256(from)
	if err != nil {
		return nil, "", fmt.Errorf("restore: --from %s: %w", from, err)
	}
	if want != "" && want != sum {
		return nil, "", fmt.Errorf("restore: --from %s: checksum mismatch: the file hashes to %s, %s%s says %s: the copy is damaged, take another", from, sum, from, ChecksumSuffix, want)
	}
	rep, err := VerifyFile(from, opt)
	if err != nil {
		return nil, "", fmt.Errorf("restore: %w", err)
	}
	if !rep.OK() {
		return nil, "", fmt.Errorf("restore: --from %s fails the full check (%d problem(s), first: %s): nothing was changed; run `pulsefleet verify --file %s`", from, len(rep.Problems), rep.Problems[0], from)
	}
	if rep.StoreID == "" {
		return nil, "", fmt.Errorf("restore: --from %s has no store id (meta/store_id): not a pulsefleet snapshot", from)
	}
	return rep, sum, nil
}

// restoreIdentity makes the identity file name the restored store: one
// that names another store (or cannot be read) is kept aside as
// .before-restore-STAMP, recorded in res.IdentAside.
func restoreIdentity(dir, storeID, stamp string, now time.Time, res *RestoreResult) error {
	ident, err := readIdentity(dir)
	if err != nil || ident == nil || ident.StoreID != storeID {
		ip := filepath.Join(dir, IdentityFileName)
		if _, serr := os.Stat(ip); serr == nil {
			res.IdentAside = ip + ".before-restore-" + stamp
			if err := os.Rename(ip, res.IdentAside); err != nil {
				return fmt.Errorf("restore: keep the old identity file aside: %w", err)
			}
		}
		if err := writeIdentity(dir, storeID, now); err != nil {
			return fmt.Errorf("restore: %w", err)
		}
	}
	return nil
}

func copyFileSynced(from, to string) error {
	in, err := os.Open(from)
	if err != nil {
		return err
	}
	defer in.Close()
	out, err := os.OpenFile(to, os.O_WRONLY|os.O_CREATE|os.O_TRUNC, 0o600)
	if err != nil {
		return err
	}
	_, err = io.Copy(out, in)
	if err == nil {
		err = out.Sync()
	}
	if cerr := out.Close(); err == nil {
		err = cerr
	}
	return err
}
