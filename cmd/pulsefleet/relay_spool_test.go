package main

import (
	"bytes"
	"context"
	"fmt"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"
)

// The gateway is killed (-9) in the middle of a stream and restarted on
// the same address three seconds later. The relay, with --spool, keeps
// what was not acknowledged, reconnects, resumes from the gateway's
// acknowledged sequence, and in the end every line it read is in the store
// exactly once (the ingest ledger: each sequence number once, the samples
// adding up to the lines).
func TestRelaySpoolSurvivesGatewayKill9(t *testing.T) {
	if testing.Short() {
		t.Skip("process test in real time")
	}
	lines := ppgLines(25, 100, 18, 21, false)
	link := newSerialLink(t)
	data := t.TempDir()
	gw := startServe(t, data)
	addr := gw.grpcAddr
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	res := relayInBackground(t, ctx, "--gateway", addr, "--device", "relay-k9", "--model", "proto-t",
		"--serial", link.Path, "--rate", "100", "--adc-bits", "18", "--spool", t.TempDir())
	time.Sleep(300 * time.Millisecond)
	emitted := make(chan error, 1)
	go func() { emitted <- link.emit(ctx, lines, 100) }()
	time.Sleep(8 * time.Second)
	if err := gw.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	<-gw.exited
	time.Sleep(3 * time.Second)
	gw = startServe(t, data, "--grpc-listen", addr)
	if err := <-emitted; err != nil {
		t.Fatal(err)
	}
	// The relay's backoff reaches 5 s at most: give it time to resend.
	time.Sleep(8 * time.Second)
	cancel()
	r := <-res
	t.Logf("%+v", r.rep)
	want := uint64(len(lines))
	if r.code != 0 || r.rep.LinesRead != want || r.rep.SamplesAcked != want || r.rep.Reconnects == 0 {
		t.Fatalf("exit %d: read %d, acknowledged %d, reconnects %d; want %d read and acknowledged after a reconnect; stderr:\n%s",
			r.code, r.rep.LinesRead, r.rep.SamplesAcked, r.rep.Reconnects, want, r.stderr)
	}
	gw.cmd.Process.Signal(syscall.SIGTERM)
	<-gw.exited
	if l := ledgerOf(t, data, "relay-k9"); l.Samples != want || !l.Distinct {
		t.Errorf("store ledger %+v, want %d samples, each sequence number once", l, want)
	}
}

// The relay itself is killed (-9) while it sends a recording at its own
// pace with --spool, and started again with the same flags: it delivers
// what the spool held and goes on in the file after it; every line of the
// file is stored exactly once.
func TestRelaySpoolSurvivesRelayKill9(t *testing.T) {
	if testing.Short() {
		t.Skip("process test in real time")
	}
	lines := ppgLines(20, 100, 18, 22, true)
	in := filepath.Join(t.TempDir(), "rec.csv")
	writeLines(t, in, lines)
	addr, dir, stop := startTestGateway(t)
	spool := t.TempDir()
	args := []string{"relay", "--gateway", addr, "--device", "relay-self-k9", "--model", "proto-t", "--in", in,
		"--rate", "100", "--adc-bits", "18", "--spool", spool, "--realtime"}

	first := exec.Command(binary(t), args...)
	var errb bytes.Buffer
	first.Stderr = &errb
	if err := first.Start(); err != nil {
		t.Fatal(err)
	}
	time.Sleep(6 * time.Second)
	first.Process.Signal(syscall.SIGKILL)
	first.Wait()

	second := exec.Command(binary(t), args...)
	var out bytes.Buffer
	second.Stdout, second.Stderr = &out, &errb
	err := second.Run()
	rep := decodeRelayJSON(t, out.String(), errb.String())
	t.Logf("%+v\n%s", rep, errb.String())
	if err != nil {
		t.Fatalf("second run: %v; stderr:\n%s", err, errb.String())
	}
	want := uint64(len(lines) - 1)
	if rep.FromSpool+rep.LinesRead != rep.SamplesAcked+rep.LinesRejected || rep.LinesRead >= want {
		t.Errorf("second run's JSON line: %+v; want it to balance and to read less than the whole file", rep)
	}
	if !strings.Contains(errb.String(), "going on after byte") {
		t.Errorf("the second run did not resume in the file; stderr:\n%s", errb.String())
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	if l := ledgerOf(t, dir, "relay-self-k9"); l.Samples != want || !l.Distinct {
		t.Errorf("store ledger %+v, want %d samples (every line of the file), each sequence number once", l, want)
	}
}

// 1,000 malformed lines of four kinds among 30,000 good ones: every good
// line is stored, every bad one counted under its reason, and the stream
// never stops.
func TestRelayCountsMalformedLinesByReason(t *testing.T) {
	good := ppgLines(300, 100, 18, 5, true)
	bad := map[string]func(i int) string{
		"fields":       func(i int) string { return fmt.Sprint(1000 + i) },
		"not_a_number": func(i int) string { return fmt.Sprintf("12%cx4,5678", 'a'+i%26) },
		"out_of_range": func(i int) string { return fmt.Sprintf("%d,5678", 1<<18+i) },
		"too_long":     func(i int) string { return strings.Repeat("1", 1100+i) + ",2" },
	}
	kinds := []string{"fields", "not_a_number", "out_of_range", "too_long"}
	var mixed []string
	mixed = append(mixed, good[0], good[1]) // header and a sample first
	b := 0
	for i, l := range good[2:] {
		mixed = append(mixed, l)
		if i%30 == 7 && b < 1000 {
			mixed = append(mixed, bad[kinds[b%4]](b))
			b++
		}
	}
	if b != 1000 || len(good)-1 != 30000 {
		t.Fatalf("test data: %d bad, %d good", b, len(good)-1)
	}
	in := filepath.Join(t.TempDir(), "mixed.csv")
	writeLines(t, in, mixed)
	addr, dir, stop := startTestGateway(t)
	code, rep, stderr := relayCmd(t, context.Background(), "", "--gateway", addr, "--device", "relay-bad", "--model", "proto-t",
		"--in", in, "--rate", "100", "--adc-bits", "18")
	t.Logf("%+v", rep)
	if code != 0 {
		t.Fatalf("exit %d; stderr:\n%s", code, stderr)
	}
	for _, k := range kinds {
		if rep.RejectedReason[k] != 250 {
			t.Errorf("%s: %d rejected, want 250", k, rep.RejectedReason[k])
		}
	}
	if rep.LinesRead != 31000 || rep.LinesRejected != 1000 || rep.SamplesAcked != 30000 {
		t.Errorf("read %d, rejected %d, acknowledged %d; want 31000, 1000, 30000", rep.LinesRead, rep.LinesRejected, rep.SamplesAcked)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	if l := ledgerOf(t, dir, "relay-bad"); l.Samples != 30000 || !l.Distinct {
		t.Errorf("store ledger %+v, want 30000 samples once", l)
	}
}
