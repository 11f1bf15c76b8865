package main

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"time"

	"golang.org/x/term"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

const restoreSummary = `Put a snapshot (from 'pulsefleet backup' or serve --backup-dir) in place of a
data directory's store.

The gateway on DIR must be stopped: restore takes the store's lock and
refuses while a gateway holds it. Before anything in DIR changes, the
snapshot must match FILE.sha256 (when that file is there) and pass the full
check of 'pulsefleet verify --file FILE'. The snapshot is copied into DIR and
synced, the previous pulsefleet.db is kept aside as
pulsefleet.db.before-restore-TIME, and the identity file pulsefleet.id is
made to name the restored store (an identity file naming another store is
kept aside the same way). Devices then resume from the snapshot's cursors:
what they sent after the snapshot is asked for again and accepted once.`

func init() {
	register(command{name: "restore", summary: restoreSummary, run: runRestore})
}

func runRestore(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("restore", "--data DIR --from FILE", s.err)
	data := fs.String("data", "", "data directory of a stopped gateway (required; created when missing)")
	from := fs.String("from", "", "snapshot file to restore (required)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *data == "" || *from == "" {
		return usagef("--data and --from are required")
	}
	opt := store.VerifyOptions{}
	if f, ok := s.err.(*os.File); ok && term.IsTerminal(int(f.Fd())) {
		var p *tuneProgress
		opt.Progress = func(phase string, done, total int) {
			if phase == "records" {
				if p == nil {
					p = newTuneProgress(s.err, "verify")
				}
				p.update(done, total)
			}
		}
		defer func() {
			if p != nil {
				p.finish()
			}
		}()
	}
	res, err := store.Restore(*data, *from, opt, time.Now())
	if errors.Is(err, store.ErrLocked) {
		return fmt.Errorf("%w: stop the gateway on --data %s first (nothing was changed)", err, *data)
	}
	if err != nil {
		return err
	}
	fmt.Fprintf(s.out, "restored store %s from %s (sha256 %s) into %s\n", res.StoreID, *from, res.SHA256, filepath.Join(*data, store.FileName))
	if res.KeptAside != "" {
		fmt.Fprintf(s.out, "previous store kept as %s\n", res.KeptAside)
	}
	if res.IdentAside != "" {
		fmt.Fprintf(s.out, "previous identity file kept as %s\n", res.IdentAside)
	}
	return nil
}
