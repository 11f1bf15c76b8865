package uplink

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/protobuf/proto"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func chunkMsg(i int) *pb.ConnectRequest {
	return &pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{
		DeviceTimeUnixMs: 1_700_000_000_000 + int64(i)*250, SampleRateHz: 100, Red: []uint32{uint32(i), 2}, Ir: []uint32{3, 4}}}}
}

func newTestClient(t *testing.T, dir string, maxBytes int64) (*Client, *Recovered) {
	t.Helper()
	c, rec, err := New(Options{Address: "127.0.0.1:1", Dial: func(string) (*grpc.ClientConn, error) { return nil, fmt.Errorf("no dialing here") },
		Intro: &pb.Introduction{DeviceId: "d"}, SpoolDir: dir, SpoolMeta: []byte(`{"device":"d"}`), MaxBytes: maxBytes})
	if err != nil {
		t.Fatal(err)
	}
	return c, rec
}

// What the spool held survives a restart of its owner: acknowledged
// messages are gone, the rest come back in order with their bytes, their
// numbering (including a renumbering after the gateway's) and the owner's
// last mark; a record torn by a crash is cut off, not misread.
func TestSpoolRecoversHeldMessagesAndCutsATornTail(t *testing.T) {
	dir := t.TempDir()
	c, _ := newTestClient(t, dir, 0)
	ctx := context.Background()
	for i := 1; i <= 10; i++ {
		if err := c.Add(ctx, chunkMsg(i), 2, []byte(fmt.Sprintf("mark-%d", i)), true); err != nil {
			t.Fatal(err)
		}
	}
	// The first welcome: the gateway knows the id through 40 (an earlier
	// life), so the ten are renumbered 41..50; then it acknowledges 44.
	if err := c.welcome(40); err != nil {
		t.Fatal(err)
	}
	c.onAck(44)
	if s := c.Stats(); s.HeldMessages != 6 || s.SamplesAcked != 8 || s.Renumbered != 1 {
		t.Fatalf("after ack: %+v", s)
	}
	if err := c.Close(); err != nil {
		t.Fatal(err)
	}
	f, err := os.OpenFile(filepath.Join(dir, spoolName), os.O_APPEND|os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	f.Write([]byte{0, 0, 0, 40, 1, 2, 3, 4, 'D', 9}) // a record cut short by a crash
	f.Close()

	c2, rec := newTestClient(t, dir, 0)
	defer c2.Close()
	if rec.Messages != 6 || rec.Samples != 12 || string(rec.Mark) != "mark-10" || rec.CutBytes != 10 || string(rec.Meta) != `{"device":"d"}` {
		t.Fatalf("recovered %+v", *rec)
	}
	for i, it := range c2.items[c2.head:] {
		m, err := c2.load(it)
		if err != nil {
			t.Fatal(err)
		}
		want := chunkMsg(5 + i)
		want.GetRawChunk().Sequence = uint64(45 + i)
		if it.seq != uint64(45+i) || !proto.Equal(m, want) {
			t.Errorf("held %d: seq %d, %v; want 45+%d, %v", i, it.seq, m, i, want)
		}
	}
	if c2.nextSeq != 51 || !c2.welcomed {
		t.Errorf("next sequence %d welcomed %v, want 51 and true", c2.nextSeq, c2.welcomed)
	}
}

// A rewrite keeps exactly the held messages; a full buffer refuses a
// live source's message (ErrFull) and makes a recording's Add wait.
func TestSpoolRewriteAndBound(t *testing.T) {
	dir := t.TempDir()
	size := int64(proto.Size(chunkMsg(1)) + 8)
	c, _ := newTestClient(t, dir, 3*size+size/2)
	ctx := context.Background()
	for i := 1; i <= 3; i++ {
		if err := c.Add(ctx, chunkMsg(i), 2, nil, true); err != nil {
			t.Fatal(err)
		}
	}
	if err := c.Add(ctx, chunkMsg(4), 2, nil, false); err != ErrFull {
		t.Fatalf("fourth message over the bound: %v, want ErrFull", err)
	}
	wctx, cancel := context.WithTimeout(ctx, 50*time.Millisecond)
	if err := c.Add(wctx, chunkMsg(4), 2, nil, true); err != context.DeadlineExceeded {
		t.Fatalf("blocking Add with no room: %v, want it to wait until its deadline", err)
	}
	cancel()
	c.onAck(1)
	if err := c.sp.rewrite(c.meta, c.welcomed, c.finished, []byte("m"), c.items[c.head:]); err != nil {
		t.Fatal(err)
	}
	if err := c.Add(ctx, chunkMsg(4), 2, nil, false); err != nil {
		t.Fatalf("after an ack there is room: %v", err)
	}
	c.Close()
	c2, rec := newTestClient(t, dir, 0)
	defer c2.Close()
	if rec.Messages != 3 || c2.items[0].seq != 2 || c2.nextSeq != 5 {
		t.Errorf("after rewrite: %+v, first %d, next %d; want 2..4 held", *rec, c2.items[0].seq, c2.nextSeq)
	}
}

// The reconnect schedule grows by its factor up to its ceiling, each wait
// within 0.8..1.2 of its step.
func TestBackoffGrowsWithJitter(t *testing.T) {
	b := Backoff{Base: 100 * time.Millisecond, Ceiling: time.Second, Factor: 2}
	steps := []time.Duration{100, 200, 400, 800, 1000, 1000}
	for i, s := range steps {
		s *= time.Millisecond
		w := b.Next()
		if w < s*8/10 || w > s*12/10 {
			t.Errorf("wait %d: %v, want %v +-20 %%", i, w, s)
		}
	}
	b.Reset()
	if w := b.Next(); w > 120*time.Millisecond {
		t.Errorf("after Reset: %v", w)
	}
}

// A redirect is followed only while it works: when the gateway it named
// cannot be reached, the client goes back to its own address, then through
// its fallbacks in turn.
func TestUnreachableRedirectFallsBack(t *testing.T) {
	var mu sync.Mutex
	var tried []string
	c, _, err := New(Options{Address: "a:1", Fallbacks: []string{"b:1", "c:1"},
		Dial: func(addr string) (*grpc.ClientConn, error) {
			mu.Lock()
			tried = append(tried, addr)
			mu.Unlock()
			return nil, fmt.Errorf("connection refused")
		},
		Intro: &pb.Introduction{DeviceId: "d"}, Backoff: Backoff{Base: time.Millisecond, Ceiling: 2 * time.Millisecond}})
	if err != nil {
		t.Fatal(err)
	}
	c.addr = "owner:1" // where a redirect had sent it
	ctx, cancel := context.WithCancel(context.Background())
	go func() {
		for {
			mu.Lock()
			n := len(tried)
			mu.Unlock()
			if n >= 5 {
				cancel()
				return
			}
			time.Sleep(time.Millisecond)
		}
	}()
	c.Run(ctx)
	mu.Lock()
	defer mu.Unlock()
	want := []string{"owner:1", "a:1", "b:1", "c:1", "a:1"}
	if len(tried) < 5 || !slices.Equal(tried[:5], want) {
		t.Fatalf("dialled %q, want %q first", tried, want)
	}
}
