package main

import (
	"context"
	"fmt"
	"io"
	"os"

	"golang.org/x/term"
	"google.golang.org/grpc"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

const backupSummary = `Take a consistent snapshot of a running gateway's store over gRPC.

The gateway copies its store in one read transaction (bbolt's transactional
copy, not a file copy) while it goes on ingesting: the snapshot holds every
message acknowledged before it began. It arrives in chunks with a SHA-256 at
the end; FILE is written under a temporary name in its directory, checked
against the SHA-256, synced and renamed only when complete (mode 0600), and
the checksum is recorded in FILE.sha256 (sha256sum -c reads it). A stream
that ends early leaves FILE as it was and exits non-zero. Needs the admin
role (--token or $PULSEFLEET_TOKEN); the gateway audits every backup.
Progress goes to stderr when it is a terminal. Check a snapshot with
'pulsefleet verify --file FILE'; put it back with 'pulsefleet restore'.`

func init() {
	register(command{name: "backup", summary: backupSummary, run: runBackup})
}

func runBackup(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("backup", "--gateway ADDR --out FILE [--token T]", s.err)
	cf.register(fs)
	out := fs.String("out", "", "snapshot file to write (required)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	if len(addrs) != 1 {
		return usagef("--gateway: %d addresses, want one (each gateway of a sharded fleet has its own store: back them up one by one)", len(addrs))
	}
	if *out == "" || *out == "-" {
		return usagef("--out: required, a file name (a snapshot is not written to stdout)")
	}
	var progress func(done, total int64)
	if f, ok := s.err.(*os.File); ok && term.IsTerminal(int(f.Fd())) {
		p := newTuneProgress(s.err, "backup")
		defer p.finish()
		progress = func(done, total int64) { p.update(int(done>>10), int(total>>10)) }
	}
	res, err := fetchBackup(ctx, &cf, addrs[0], *out, progress)
	if err != nil {
		return err
	}
	fmt.Fprintf(s.out, "backup %s: %d bytes of store %s, sha256 %s (in %s%s)\n", *out, res.size, res.storeID, res.sum, *out, store.ChecksumSuffix)
	return nil
}

const backupWindow = 1 << 20

type backupResult struct {
	size    int64
	storeID string
	sum     string
}

// fetchBackup streams a snapshot from the gateway at addr into path.
func fetchBackup(ctx context.Context, cf *clientFlags, addr, path string, progress func(done, total int64)) (*backupResult, error) {
	// A fixed 1 MiB flow-control window (it turns off grpc's window growth):
	// the gateway sends at most that far ahead of what is written, which
	// bounds what a backup holds in memory on either side.
	conn, err := cf.dialWith(addr, grpc.WithInitialWindowSize(backupWindow), grpc.WithInitialConnWindowSize(backupWindow))
	if err != nil {
		return nil, err
	}
	defer conn.Close()
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st, err := pb.NewAdminServiceClient(conn).Backup(cf.ctx(ctx), &pb.BackupRequest{})
	if err != nil {
		return nil, fmt.Errorf("backup from %s: %w", addr, err)
	}
	bf, err := store.CreateBackupFile(path)
	if err != nil {
		return nil, err
	}
	res := &backupResult{}
	var size int64 = -1
	for {
		m, err := st.Recv()
		if err == io.EOF {
			bf.Abort()
			return nil, fmt.Errorf("backup from %s: the stream ended after %d of %d bytes without the closing checksum: incomplete, %s left as it was", addr, bf.Size(), max(size, 0), path)
		}
		if err != nil {
			bf.Abort()
			return nil, fmt.Errorf("backup from %s: %w (after %d bytes; %s left as it was)", addr, err, bf.Size(), path)
		}
		if size < 0 {
			size, res.storeID = m.GetSizeBytes(), m.GetStoreId()
			if size <= 0 || res.storeID == "" {
				bf.Abort()
				return nil, fmt.Errorf("backup from %s: the first message has no size or store id", addr)
			}
		}
		if len(m.GetChunk()) > 0 {
			if _, err := bf.Write(m.GetChunk()); err != nil {
				bf.Abort()
				return nil, err
			}
			if bf.Size() > size {
				bf.Abort()
				return nil, fmt.Errorf("backup from %s: more bytes (%d) than announced (%d)", addr, bf.Size(), size)
			}
			if progress != nil {
				progress(bf.Size(), size)
			}
		}
		if sum := m.GetSha256(); sum != "" {
			if bf.Size() != size {
				bf.Abort()
				return nil, fmt.Errorf("backup from %s: %d bytes received, %d announced", addr, bf.Size(), size)
			}
			res.size = size
			if res.sum, err = bf.Commit(sum); err != nil {
				return nil, err
			}
			return res, nil
		}
	}
}
