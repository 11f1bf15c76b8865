package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// seedCLIStore writes a small store with devices, history, ledger, cursors
// and audit entries into a new data directory.
func seedCLIStore(t *testing.T) string {
	t.Helper()
	dir := t.TempDir()
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	start := time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC).UnixMilli()
	for d := 0; d < 20; d++ {
		dev := &store.Device{ID: fmt.Sprintf("ward%d-bed%02d", d/10, d), Mode: "summary", Labels: map[string]string{"ward": "5"}}
		b := &store.Batch{Devices: []*store.Device{dev}}
		for i := int64(0); i < 400; i++ {
			ms := start + i*1000
			b.Points = append(b.Points, store.Point{Device: dev.ID, TimeMS: ms, SpO2: 95, Pulse: 72, PI: 2, SQI: 0.9, Ratio: 0.5, Source: 2})
			b.Chunks = append(b.Chunks, store.Chunk{Device: dev.ID, Seq: uint64(i + 1), DeviceTimeMS: ms, ArrivalMS: ms + 30})
		}
		b.Cursors = append(b.Cursors, store.Cursor{Device: dev.ID, LastSeq: 400, Chunks: 400, LastSeenMS: start + 400_000})
		for i := 0; i < 30; i++ {
			b.Audit = append(b.Audit, &store.AuditEntry{TimeMS: start + int64(i), Actor: "nurse-b", Action: "alarm.acknowledged", Device: dev.ID})
		}
		if err := db.Write(b); err != nil {
			t.Fatal(err)
		}
	}
	if err := db.CompactAll(); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	return dir
}

// pageOf returns the root page of the bucket at path (nested names) and the page size.
func pageOf(t *testing.T, file string, path ...string) (int, int) {
	t.Helper()
	b, err := bolt.Open(file, 0o400, &bolt.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	var id int
	_ = b.View(func(tx *bolt.Tx) error {
		bk := tx.Bucket([]byte(path[0]))
		for _, p := range path[1:] {
			bk = bk.Bucket([]byte(p))
		}
		id = int(bk.Root())
		return nil
	})
	if id == 0 {
		t.Fatalf("bucket %v is inline, has no page of its own", path)
	}
	return id, b.Info().PageSize
}

func invertPage(t *testing.T, file string, id, size int) {
	t.Helper()
	f, err := os.OpenFile(file, os.O_RDWR, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	buf := make([]byte, size)
	f.ReadAt(buf, int64(id*size))
	for i := range buf {
		buf[i] ^= 0xff
	}
	f.WriteAt(buf, int64(id*size))
}

// runBinary runs the binary and returns its exit status and standard error.
func runBinary(t *testing.T, args ...string) (int, string) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	cmd := exec.CommandContext(ctx, binary(t), args...)
	var stderr strings.Builder
	cmd.Stdout, cmd.Stderr = io.Discard, &stderr
	err := cmd.Run()
	out := stderr.String()
	code := 0
	if ee, ok := err.(*exec.ExitError); ok {
		code = ee.ExitCode()
	} else if err != nil {
		t.Fatalf("%v: %v", args, err)
	}
	return code, string(out)
}

// Every corruption kind makes serve (a real process), export, audit and
// verify exit non-zero with one clear sentence naming the file, never a
// panic or a store served silently.
func TestCorruptStoreCommandsFailCleanly(t *testing.T) {
	if testing.Short() {
		t.Skip("runs processes")
	}
	seed := seedCLIStore(t)
	seedFile := filepath.Join(seed, store.FileName)
	devPage, pageSize := pageOf(t, seedFile, "devices")
	// Truncate into the pages in use: half the high-water mark (the file
	// itself grows in large steps beyond it).
	var inUse int64
	if b, err := bolt.Open(seedFile, 0o400, &bolt.Options{ReadOnly: true}); err != nil {
		t.Fatal(err)
	} else {
		b.View(func(tx *bolt.Tx) error { inUse = tx.Size(); return nil })
		b.Close()
	}
	histPage, _ := pageOf(t, seedFile, "trend", "ward0-bed05")
	if code, out := runBinary(t, "verify", "--data", seed); code != 0 {
		t.Fatalf("healthy store: verify exit %d:\n%s", code, out)
	}

	type corruption struct {
		name  string
		apply func(file string)
		serve []string // extra serve flags needed to find it
		audit bool     // the audit log reads the damage
	}
	for _, tc := range []corruption{
		{name: "zero-length", apply: func(f string) { os.Truncate(f, 0) }, audit: true},
		{name: "truncated", apply: func(f string) { os.Truncate(f, inUse/2) }, audit: true},
		{name: "devices page flipped", apply: func(f string) { invertPage(t, f, devPage, pageSize) }, audit: true},
		{name: "history page flipped", apply: func(f string) { invertPage(t, f, histPage, pageSize) }, serve: []string{"--verify-store", "full"}},
		{name: "meta page 0 flipped", apply: func(f string) { invertPage(t, f, 0, pageSize) }, audit: true},
		{name: "both meta pages flipped", apply: func(f string) { invertPage(t, f, 0, pageSize); invertPage(t, f, 1, pageSize) }, audit: true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			for _, n := range []string{store.FileName, store.IdentityFileName} {
				b, err := os.ReadFile(filepath.Join(seed, n))
				if err != nil {
					t.Fatal(err)
				}
				os.WriteFile(filepath.Join(dir, n), b, 0o600)
			}
			file := filepath.Join(dir, store.FileName)
			tc.apply(file)
			runs := [][]string{
				append([]string{"serve", "--data", dir, "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0"}, tc.serve...),
				{"export", "--data", dir, "--format", "csv"},
				{"verify", "--data", dir},
				{"verify", "--file", file},
			}
			if tc.audit {
				runs = append(runs, []string{"audit", "--data", dir})
			}
			for _, args := range runs {
				code, out := runBinary(t, args...)
				if code == 0 {
					t.Errorf("%s: exit 0 on a damaged store:\n%s", args[0], out)
					continue
				}
				if strings.HasPrefix(out, "panic") || strings.Contains(out, "\npanic") || strings.Contains(out, "goroutine ") {
					t.Errorf("%s: panicked:\n%s", args[0], out)
					continue
				}
				last := lastLine(out)
				if !strings.HasPrefix(last, "pulsefleet "+args[0]+": ") || !strings.Contains(last, file) ||
					!(strings.Contains(last, "verify") || strings.Contains(last, "--new-store")) {
					t.Errorf("%s: exit %d, last line does not name the file and what to do:\n%s", args[0], code, out)
				}
			}
		})
	}
}

func lastLine(s string) string {
	lines := strings.Split(strings.TrimSpace(s), "\n")
	return lines[len(lines)-1]
}

// A store file that vanished where pulsefleet.id says one was created:
// serve refuses instead of starting empty (and, without credentials, open);
// --new-store starts afresh on purpose.
func TestServeRefusesAVanishedStore(t *testing.T) {
	if testing.Short() {
		t.Skip("runs processes")
	}
	dir := seedCLIStore(t)
	os.Remove(filepath.Join(dir, store.FileName))
	code, out := runBinary(t, "serve", "--data", dir, "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0")
	if code != 1 || !strings.Contains(lastLine(out), "--new-store") || !strings.Contains(lastLine(out), "missing") {
		t.Fatalf("serve on a vanished store: exit %d:\n%s", code, out)
	}
	if _, err := os.Stat(filepath.Join(dir, store.FileName)); err == nil {
		t.Fatal("the refused serve created an empty store")
	}
	c := startServe(t, dir, "--new-store")
	if err := c.cmd.Process.Signal(os.Interrupt); err != nil {
		t.Fatal(err)
	}
	if err := <-c.exited; err != nil {
		t.Fatalf("serve --new-store: %v\n%s", err, c.stderr)
	}
}

// A store a real gateway wrote (raw and summary devices with alarms and raw
// capture, stopped by SIGTERM, then by kill -9 mid-stream) passes verify:
// the checks know every record the gateway writes, so a healthy pilot never
// fails them.
func TestVerifyPassesStoresAGatewayWrote(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	data := t.TempDir()
	for round, stop := range []os.Signal{syscall.SIGTERM, syscall.SIGKILL} {
		c := startServe(t, data, "--capture-raw")
		ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
		done := make(chan error, 1)
		go func() {
			_, err := sim.Run(ctx, sim.Options{Gateway: c.grpcAddr, Devices: 6, IDPrefix: fmt.Sprintf("round%d", round), Mode: sim.ModeRaw,
				RateHz: 100, Chunk: 25, Duration: 2 * time.Second, Seed: uint64(round + 1), DropEvery: 700 * time.Millisecond})
			done <- err
		}()
		if stop == syscall.SIGKILL {
			time.Sleep(1500 * time.Millisecond) // mid-stream
		} else if err := <-done; err != nil {
			t.Fatal(err)
		}
		if err := c.cmd.Process.Signal(stop); err != nil {
			t.Fatal(err)
		}
		<-c.exited
		cancel()
		if stop == syscall.SIGKILL {
			<-done
		}
		if code, out := runBinary(t, "verify", "--data", data); code != 0 {
			t.Fatalf("after %v: verify exit %d:\n%s", stop, code, out)
		}
	}
	if id, err := store.ReadIdentity(data); err != nil || id == nil {
		t.Errorf("no identity file in the gateway's data directory: %v", err)
	}
}
