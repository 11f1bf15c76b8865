package main

import (
	"context"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// durableSequences asks a running gateway for every device's highest durable
// sequence number (what it has acknowledged).
func durableSequences(t *testing.T, addr string) map[string]uint64 {
	t.Helper()
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	resp, err := pb.NewFleetServiceClient(conn).ListDevices(ctx, &pb.ListDevicesRequest{})
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]uint64{}
	for _, d := range resp.GetDevices() {
		out[d.GetDeviceId()] = d.GetLastSequence()
	}
	return out
}

// A backup taken through a gateway while raw devices stream: the devices
// see every message acknowledged and no stream error; the snapshot passes
// the full check and holds every message acknowledged before it began. A
// gateway killed (-9) in the middle of a later backup leaves the earlier
// good file untouched and no partial file, and its store intact. The
// snapshot restored into a new data directory serves a gateway from which
// the devices resume at the snapshot's cursors, nothing duplicated or lost.
func TestBackupUnderLoadKill9AndRestore(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	data, outDir := t.TempDir(), t.TempDir()
	good := filepath.Join(outDir, "pilot.db")
	// History from before this run: the snapshot must be large enough for
	// the kill below to cut it, whatever the store's encodings save.
	func() {
		db, err := store.Open(data, store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		defer db.Close()
		var filler []*store.AuditEntry
		for i := 0; i < 4000; i++ {
			filler = append(filler, &store.AuditEntry{TimeMS: int64(i), Actor: "seed", Action: "test.filler", Detail: strings.Repeat("x", 1000)})
		}
		if err := db.AppendAudit(filler...); err != nil {
			t.Fatal(err)
		}
	}()
	c := startServe(t, data, "--capture-raw")
	ctx, cancel := context.WithTimeout(context.Background(), 120*time.Second)
	defer cancel()
	simOpt := sim.Options{Gateway: c.grpcAddr, Devices: 20, IDPrefix: "bk", Mode: sim.ModeRaw, RateHz: 100, Speed: 10,
		Duration: 8 * time.Second, Seed: 16}
	done := make(chan *sim.Report, 1)
	go func() {
		r, err := sim.Run(ctx, simOpt)
		if err != nil {
			t.Errorf("sim: %v", err)
		}
		done <- r
	}()
	deadline := time.Now().Add(30 * time.Second)
	for time.Now().Before(deadline) && !strings.Contains(scrapeMetrics(c.httpAddr), `pulsefleet_messages_received_total{mode="raw"}`) {
		time.Sleep(100 * time.Millisecond)
	}
	time.Sleep(time.Second)
	before := durableSequences(t, c.grpcAddr)
	if code, out := runBinary(t, "backup", "--gateway", c.grpcAddr, "--out", good); code != 0 {
		t.Fatalf("backup exit %d: %s", code, out)
	}
	rep := <-done
	if rep == nil {
		t.Fatal("the simulator did not report")
	}
	if rep.StreamErrors != 0 || rep.RejectedValid != 0 || rep.UnackedAtEnd != 0 || rep.FramesAcked != rep.FramesSent || rep.FramesAcked == 0 {
		t.Errorf("streaming during the backup: %d sent, %d acked, %d unacked, %d stream errors, %d valid rejected (%s)",
			rep.FramesSent, rep.FramesAcked, rep.UnackedAtEnd, rep.StreamErrors, rep.RejectedValid, rep.LastError)
	}
	fi, err := os.Stat(good)
	if err != nil || fi.Mode().Perm() != 0o600 {
		t.Fatalf("backup file: %v, %v; want mode 0600", fi, err)
	}
	goodSum, _ := store.FileSHA256(good)
	if rec, err := store.ReadChecksumFile(good); err != nil || rec != goodSum {
		t.Fatalf("checksum file says %q (%v), the file hashes to %s", rec, err, goodSum)
	}
	if code, out := runBinary(t, "verify", "--file", good); code != 0 {
		t.Fatalf("the snapshot fails the full check: %s", out)
	}
	snapDir := t.TempDir()
	if code, out := runBinary(t, "restore", "--data", snapDir, "--from", good); code != 0 {
		t.Fatalf("restore exit %d: %s", code, out)
	}
	snapCursors := map[string]store.Cursor{}
	func() {
		db, err := store.Open(snapDir, store.Options{ReadOnly: true})
		if err != nil {
			t.Fatal(err)
		}
		defer db.Close()
		if snapCursors, err = db.Cursors(); err != nil {
			t.Fatal(err)
		}
		tot, _ := db.LedgerTotals()
		acked := 0
		for id, seq := range before {
			if seq == 0 {
				continue
			}
			acked++
			if snapCursors[id].LastSeq < seq || tot[id].MaxSeq < seq || !tot[id].Distinct {
				t.Errorf("%s: acknowledged through %d before the backup began; the snapshot's cursor %d, ledger %+v", id, seq, snapCursors[id].LastSeq, tot[id])
			}
		}
		if acked == 0 {
			t.Fatal("nothing was acknowledged before the backup: the test proved nothing")
		}
	}()

	// kill -9 of the gateway in the middle of a backup to the same name.
	var size int64
	_, err = fetchBackup(ctx, &clientFlags{}, c.grpcAddr, good, func(done, total int64) {
		if size == 0 {
			size = total
			c.cmd.Process.Signal(syscall.SIGKILL)
			<-c.exited
		}
	})
	if size < 2*backupWindow+512<<10 {
		t.Fatalf("the snapshot has %d bytes, too few to be cut by the kill (want > %d)", size, 2*backupWindow+512<<10)
	}
	if err == nil {
		t.Fatal("a backup cut by kill -9 reported success")
	}
	t.Logf("backup of %d bytes cut: %v", size, err)
	if sum, _ := store.FileSHA256(good); sum != goodSum {
		t.Error("the cut backup replaced the good file")
	}
	if ents, _ := os.ReadDir(outDir); len(ents) != 2 {
		t.Errorf("after the cut backup the directory holds %v, want the good file and its checksum only", ents)
	}
	if code, out := runBinary(t, "verify", "--data", data); code != 0 {
		t.Fatalf("the store of the killed gateway fails the check: %s", out)
	}

	// Restore into a new directory, start a gateway, stream again.
	fresh := t.TempDir()
	if code, out := runBinary(t, "restore", "--data", fresh, "--from", good); code != 0 {
		t.Fatalf("restore exit %d: %s", code, out)
	}
	c2 := startServe(t, fresh)
	simOpt.Gateway, simOpt.Duration, simOpt.Seed = c2.grpcAddr, 2*time.Second, 17
	rep2, err := sim.Run(ctx, simOpt)
	if err != nil {
		t.Fatal(err)
	}
	if rep2.StreamErrors != 0 || rep2.ResumeRegress != 0 || rep2.UnackedAtEnd != 0 || rep2.FramesAcked == 0 {
		t.Errorf("streaming to the restored gateway: %+v", rep2)
	}
	c2.cmd.Process.Signal(syscall.SIGTERM)
	<-c2.exited
	db, err := store.Open(fresh, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	tot, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	for id, cur := range snapCursors {
		lt := tot[id]
		// Contiguous 1..MaxSeq, each once, and new data past the snapshot.
		if !lt.Distinct || lt.Chunks != lt.MaxSeq || lt.MaxSeq <= cur.LastSeq {
			t.Errorf("%s: snapshot cursor %d, ledger after resuming %+v: want every sequence once, past the cursor", id, cur.LastSeq, lt)
		}
	}
	if len(snapCursors) != simOpt.Devices {
		t.Errorf("snapshot holds %d device cursors, want %d", len(snapCursors), simOpt.Devices)
	}
}
