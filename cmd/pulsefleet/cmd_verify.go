package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"sort"

	"golang.org/x/term"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

const verifySummary = `Check a store file: bbolt's consistency check and the store's own record checks.

--data DIR checks the store of a data directory (and that it is the store the
identity file pulsefleet.id says was created there); --file FILE checks any
store file, such as a copy or a backup. The gateway must be stopped (verify
reads the file with a shared lock). The checks: both meta pages, the file
reaching its high-water mark, bbolt's tx.Check (page references, freelist,
key order), and for every record its version byte, that it decodes, that
its key has the right length, day and id, and that cursors and the ingest
ledger agree with the device records. Exit status 0 when nothing is wrong,
1 with a summary of the problems otherwise.`

func init() {
	register(command{name: "verify", summary: verifySummary, run: runVerify})
}

func runVerify(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("verify", "--data DIR | --file FILE [--format text|json] [--max-problems N]", s.err)
	data := fs.String("data", "", "data directory holding pulsefleet.db (and pulsefleet.id)")
	file := fs.String("file", "", "a store file to check, e.g. a backup")
	format := fs.String("format", "text", "output: text or json")
	maxProblems := fs.Int("max-problems", 100, "stop after this many problems, 1..100000")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if (*data == "") == (*file == "") {
		return usagef("--data, --file: give exactly one")
	}
	if *format != "text" && *format != "json" {
		return usagef("--format: %q, want text or json", *format)
	}
	if *maxProblems < 1 || *maxProblems > 100000 {
		return usagef("--max-problems: %d, want 1..100000", *maxProblems)
	}
	opt := store.VerifyOptions{MaxProblems: *maxProblems}
	if f, ok := s.err.(*os.File); ok && term.IsTerminal(int(f.Fd())) {
		var p *tuneProgress
		opt.Progress = func(phase string, done, total int) {
			if phase != "records" {
				if p != nil {
					p.finish()
					p = nil
				}
				fmt.Fprintf(s.err, "verify: bbolt consistency check...\n")
				return
			}
			if p == nil {
				p = newTuneProgress(s.err, "records")
			}
			p.update(done, total)
		}
		defer func() {
			if p != nil {
				p.finish()
			}
		}()
	}
	var rep *store.VerifyReport
	var err error
	if *data != "" {
		rep, err = store.VerifyDir(*data, opt)
	} else {
		rep, err = store.VerifyFile(*file, opt)
	}
	if errors.Is(err, store.ErrLocked) {
		return fmt.Errorf("%w: stop the gateway first, or verify a copy made by a backup", err)
	}
	if err != nil {
		return err
	}
	if *format == "json" {
		enc := json.NewEncoder(s.out)
		enc.SetIndent("", "  ")
		if err := enc.Encode(rep); err != nil {
			return err
		}
	} else {
		writeVerifyReport(s.out, rep)
	}
	if !rep.OK() {
		what := "--file " + rep.Path
		if *data != "" {
			what = "--data " + *data
		}
		return fmt.Errorf("store %s: %d problem(s) found (first: %s): restore a backup (or move the file aside and start afresh with `serve --new-store`), then run `pulsefleet verify %s` again",
			rep.Path, len(rep.Problems), rep.Problems[0], what)
	}
	return nil
}

func writeVerifyReport(w interface{ Write([]byte) (int, error) }, rep *store.VerifyReport) {
	fmt.Fprintf(w, "store %s: %.1f MiB", rep.Path, float64(rep.SizeBytes)/(1<<20))
	if rep.StoreID != "" {
		fmt.Fprintf(w, ", id %s", rep.StoreID)
	}
	fmt.Fprintln(w)
	names := make([]string, 0, len(rep.Records))
	for n := range rep.Records {
		names = append(names, n)
	}
	sort.Strings(names)
	t := newTable(w, 0, "BUCKET", "RECORDS")
	for _, n := range names {
		t.row(n, fmt.Sprint(rep.Records[n]))
	}
	_ = t.flush()
	if rep.OK() {
		fmt.Fprintf(w, "OK: %s passed bbolt's consistency check and the record checks\n", filepath.Base(rep.Path))
		return
	}
	fmt.Fprintf(w, "%d PROBLEM(S):\n", len(rep.Problems))
	for _, p := range rep.Problems {
		fmt.Fprintf(w, "  - %s\n", safeCell(p))
	}
}
