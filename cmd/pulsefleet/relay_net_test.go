package main

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"math"
	"net"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/shard"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// A device that connects to the relay (--listen) and one the relay connects
// to (--tcp), each dropping its connection half-way: the relay takes the
// next connection (or reconnects) and every line is delivered.
func TestRelayOverTCPBothWays(t *testing.T) {
	if testing.Short() {
		t.Skip("streams in real time")
	}
	addr, dir, stop := startTestGateway(t)
	first, second := ppgLines(3, 100, 16, 8, false), ppgLines(3, 100, 16, 9, false)
	send := func(c net.Conn, lines []string) { // at 100 Hz, 10 lines at a time
		start := time.Now()
		for i := 0; i < len(lines); i += 10 {
			fmt.Fprint(c, strings.Join(lines[i:min(i+10, len(lines))], "\n")+"\n")
			time.Sleep(time.Until(start.Add(time.Duration(i+10) * 10 * time.Millisecond)))
		}
		c.Close()
	}

	// --listen: the device dials the relay, twice.
	ctx, cancel := context.WithCancel(context.Background())
	bound := make(chan string, 1)
	res := make(chan relayResult, 1)
	go func() {
		var out, errb bytes.Buffer
		o := relayOptions{}
		fs := newFlagSet("relay", relaySynopsis, &errb)
		o.register(fs)
		if err := fs.Parse([]string{"--gateway", addr, "--device", "relay-listen", "--model", "proto-t", "--listen", "127.0.0.1:0", "--rate", "100"}); err != nil {
			t.Error(err)
		}
		o.listenBound = func(a string) { bound <- a }
		err := o.run(ctx, stdio{out: &out, err: &errb})
		code := 0
		if err != nil {
			code = 1
			errb.WriteString(err.Error())
		}
		res <- relayResult{code, decodeRelayJSON(t, out.String(), errb.String()), errb.String()}
	}()
	la := <-bound
	for _, lines := range [][]string{first, second} {
		c, err := net.Dial("tcp", la)
		if err != nil {
			t.Fatal(err)
		}
		send(c, lines)
		time.Sleep(300 * time.Millisecond)
	}
	time.Sleep(500 * time.Millisecond)
	cancel()
	r := <-res
	want := uint64(len(first) + len(second))
	if r.code != 0 || r.rep.SamplesAcked != want || !strings.Contains(r.stderr, "device connected") {
		t.Errorf("--listen: exit %d, %+v; want %d acknowledged; stderr:\n%s", r.code, r.rep, want, r.stderr)
	}

	// --tcp: the relay dials the device, which hangs up after each part.
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	go func() {
		for _, lines := range [][]string{first, second} {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			send(c, lines)
		}
	}()
	ctx2, cancel2 := context.WithCancel(context.Background())
	defer cancel2()
	done := relayInBackground(t, ctx2, "--gateway", addr, "--device", "relay-tcp", "--model", "proto-t", "--tcp", ln.Addr().String(), "--rate", "100")
	time.Sleep(9 * time.Second) // two parts of 3 s, a reconnect after 1 s
	cancel2()
	r = <-done
	if r.code != 0 || r.rep.SamplesAcked != want || !strings.Contains(r.stderr, "open again") {
		t.Errorf("--tcp: exit %d, %+v; want %d acknowledged after a reconnect; stderr:\n%s", r.code, r.rep, want, r.stderr)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	for _, id := range []string{"relay-listen", "relay-tcp"} {
		if l := ledgerOf(t, dir, id); l.Samples != want || !l.Distinct {
			t.Errorf("%s: ledger %+v, want %d samples once", id, l, want)
		}
	}
}

// Summary lines from standard input with absolute Unix times in a t_ms
// column: each line becomes one device-computed trend point at its own
// time, empty fields stay absent, out-of-range values are counted.
func TestRelaySummaryLinesFromStdin(t *testing.T) {
	addr, dir, stop := startTestGateway(t)
	t0 := time.Now().Add(-time.Minute).UnixMilli() / 1000 * 1000
	var b strings.Builder
	b.WriteString("t_ms,spo2,pulse,pi,sqi\n")
	for i := 0; i < 60; i++ {
		switch i {
		case 10:
			fmt.Fprintf(&b, "%d,97,,1.5,0.9\n", t0+int64(i)*1000) // no pulse this second
		case 20:
			fmt.Fprintf(&b, "%d,140,60,1.5,0.9\n", t0+int64(i)*1000) // SpO2 out of 0..100
		default:
			fmt.Fprintf(&b, "%d,%d,60,1.5,0.9\n", t0+int64(i)*1000, 95+i%3)
		}
	}
	code, rep, stderr := relayCmd(t, context.Background(), b.String(), "--gateway", addr, "--device", "relay-sum", "--model", "proto-t",
		"--in", "-", "--format", "summary")
	if code != 0 || rep.SamplesAcked != 59 || rep.RejectedReason["out_of_range"] != 1 {
		t.Fatalf("exit %d, %+v; stderr:\n%s", code, rep, stderr)
	}
	if rep.Caution != caution.Text { // docs/contracts.md, "The caution on every output"
		t.Errorf("relay JSON caution %q, want the project's caution text", rep.Caution)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	pts := storedTrend(t, dir, "relay-sum")
	if len(pts) != 59 {
		t.Fatalf("%d trend points, want 59", len(pts))
	}
	for _, p := range pts {
		if p.Source != uint8(pb.Source_SOURCE_DEVICE) || (p.TimeMS-t0)%1000 != 0 {
			t.Errorf("point %+v: want a device value at a whole second after %d", p, t0)
		}
		if p.TimeMS == t0+10_000 && !math.IsNaN(p.Pulse) {
			t.Errorf("second 10: pulse %v, want none", p.Pulse)
		}
	}
}

// In a sharded fleet the relay is pointed at a gateway that does not own
// its device: it follows the Redirect and everything lands on the owner.
func TestRelayFollowsRedirect(t *testing.T) {
	sg := newShardGroup(t, 2)
	sg.start()
	const id = "relay-shard"
	owner := shard.Owner(id, sg.addrs)
	other := sg.addrs[0]
	if other == owner {
		other = sg.addrs[1]
	}
	lines := ppgLines(5, 100, 16, 12, false)
	code, rep, stderr := relayCmd(t, context.Background(), strings.Join(lines, "\n"), "--gateway", other, "--device", id,
		"--model", "proto-t", "--in", "-", "--rate", "100")
	if code != 0 || rep.Redirects == 0 || rep.SamplesAcked != uint64(len(lines)) {
		t.Fatalf("exit %d, %+v; want a redirect and %d acknowledged; stderr:\n%s", code, rep, len(lines), stderr)
	}
	sg.stop()
	for i, d := range sg.dirs {
		db, err := store.Open(d, store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		tot, err := db.LedgerTotals()
		db.Close()
		if err != nil {
			t.Fatal(err)
		}
		want := uint64(0)
		if sg.addrs[i] == owner {
			want = uint64(len(lines))
		}
		if tot[id].Samples != want {
			t.Errorf("gateway %s: %d samples, want %d", sg.addrs[i], tot[id].Samples, want)
		}
	}
}

// A gateway that requires tokens refuses the relay's wrong one: the relay
// gives up at once (retrying cannot help), says why and exits 1 with its
// JSON line, instead of retrying for --drain.
func TestRelayGivesUpOnARefusedCredential(t *testing.T) {
	c := defaultServeConfig()
	c.Data, c.GRPCListen, c.HTTPListen, c.LogLevel, c.RequireToken = t.TempDir(), "127.0.0.1:0", "127.0.0.1:0", "error", true
	rg, stop, err := startGateway(context.Background(), c, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	defer stop()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	code, rep, stderr := relayCmd(t, ctx, strings.Join(ppgLines(2, 100, 16, 1, false), "\n"), "--gateway", rg.GRPCAddr,
		"--device", "relay-denied", "--model", "proto-t", "--in", "-", "--rate", "100", "--token", "not-a-token")
	// The refusal can arrive before all 200 lines are read; every line that
	// was read is reported unacknowledged, none silently dropped.
	if code != 1 || !strings.Contains(stderr, "refused device relay-denied") || rep.SamplesAcked != 0 ||
		rep.LinesRead == 0 || rep.LinesRead > 200 || rep.Unacked != int64(rep.LinesRead) {
		t.Errorf("exit %d, %+v; want exit 1 naming the refusal with every line read unacknowledged; stderr:\n%s", code, rep, stderr)
	}
	if ctx.Err() != nil {
		t.Error("the relay kept retrying a refused credential")
	}
}
