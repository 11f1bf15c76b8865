package cluster

import (
	"context"
	"encoding/json"
	"fmt"
	"reflect"
	"testing"
	"time"

	clientv3 "go.etcd.io/etcd/client/v3"

	"github.com/pulsefleet/pulsefleet/internal/etcdtest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// storeWith opens a store holding device dev's messages seqs, arriving 250
// ms apart from arrival on.
func storeWith(t *testing.T, dev string, arrival int64, from, to uint64) *store.DB {
	t.Helper()
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { db.Close() })
	b := &store.Batch{Devices: []*store.Device{{ID: dev, Mode: "summary"}}}
	for s := from; s <= to; s++ {
		b.Chunks = append(b.Chunks, store.Chunk{Device: dev, Seq: s, DeviceTimeMS: arrival - 40, ArrivalMS: arrival})
		arrival += 250
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	return db
}

// A gateway back from a kill asks the others through etcd which of its
// newest messages they hold: each live member answers from its store;
// HeldElsewhere picks what the asker drops; a member
// that does not answer is reported, not taken as holding nothing.
func TestAskWhichMessagesOthersHold(t *testing.T) {
	s := etcdtest.Start(t)
	c := s.Client(t)
	a, b, m := join(t, c, "a:1"), join(t, c, "b:1"), join(t, c, "c:1")
	defer a.Close()
	defer b.Close()
	defer m.Close()
	waitFor(t, 5*time.Second, "three members", func() bool { return len(a.Members()) == 3 })
	const t0 = int64(1_700_000_000_000)
	own := storeWith(t, "x", t0, 1, 12)           // a: 1..12, committed before its kill
	resent := storeWith(t, "x", t0+60_000, 9, 30) // b: 9..30, resent there after the kill
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go b.ServeHeld(ctx, resent.LedgerHeld)

	got, missing, err := a.Ask(ctx, map[string][2]uint64{"x": {1, 12}, "y": {1, 3}}, 2*time.Second)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(missing, []string{"c:1"}) {
		t.Errorf("missing %v, want [c:1] (it serves no answers)", missing)
	}
	hb := got["b:1"]["x"]
	if len(hb) != 1 || hb[0].First != 9 || hb[0].Last != 12 || hb[0].FirstArrMS != t0+60_000 {
		t.Fatalf("b's answer for x: %+v, want 9..12 arriving from %d", got["b:1"], t0+60_000)
	}
	if _, ok := got["b:1"]["y"]; ok {
		t.Errorf("b answered for y, which it never held")
	}
	newest, err := own.LedgerNewest()
	if err != nil {
		t.Fatal(err)
	}
	drops := HeldElsewhere(newest["x"], hb)
	if !reflect.DeepEqual(drops, [][2]uint64{{9, 12}}) {
		t.Fatalf("held elsewhere %v, want [[9 12]]", drops)
	}
	// A gateway whose own question is pending leaves out of its answers
	// what it may drop itself, so two returning gateways never both drop.
	if got := Exclude(hb, 10, 11); !reflect.DeepEqual(got, []store.HeldRange{
		{First: 9, Last: 9, FirstArrMS: hb[0].FirstArrMS, LastArrMS: hb[0].LastArrMS},
		{First: 12, Last: 12, FirstArrMS: hb[0].FirstArrMS, LastArrMS: hb[0].LastArrMS}}) {
		t.Errorf("exclude 10..11 of 9..12: %+v", got)
	}
	if got := Exclude(hb, 1, 20); len(got) != 0 {
		t.Errorf("exclude all: %+v", got)
	}
	if n, err := own.DropMessages("x", 9, 12); err != nil || n != 4 {
		t.Fatalf("dropped %d, %v", n, err)
	}

	// Once the third member answers too, nothing is missing; the question
	// and answers are gone from etcd afterwards.
	none := storeWith(t, "z", t0, 1, 1)
	go m.ServeHeld(ctx, none.LedgerHeld)
	got, missing, err = a.Ask(ctx, map[string][2]uint64{"x": {1, 8}}, 5*time.Second)
	if err != nil || len(missing) != 0 || len(got) != 2 || len(got["c:1"]) != 0 {
		t.Fatalf("second ask: %v, missing %v, %v", got, missing, err)
	}
	for _, p := range []string{"/t/ask/", "/t/answer/"} {
		r, err := c.Get(ctx, p, clientv3.WithPrefix())
		if err != nil || r.Count != 0 {
			t.Errorf("%s: %d keys left in etcd, %v", p, r.Count, err)
		}
	}
}

// BenchmarkAsk: the question a returning gateway asks, for n devices, to
// two other members whose stores hold every one of them (one ledger record
// each, all overlapping): one round through a real etcd, answers built from
// real stores. Reported: the question's size and the largest answer's.
func BenchmarkAsk(b *testing.B) {
	for _, n := range []int{300, 3000} {
		b.Run(fmt.Sprint(n), func(b *testing.B) {
			s := etcdtest.Start(b)
			c := s.Client(b)
			ctx, cancel := context.WithCancel(context.Background())
			defer cancel()
			var nodes []*Node
			for _, a := range []string{"a:1", "b:1", "c:1"} {
				nd, err := Join(ctx, Config{Client: c, Self: a, Prefix: "/b/"})
				if err != nil {
					b.Fatal(err)
				}
				defer nd.Close()
				nodes = append(nodes, nd)
			}
			ask := map[string][2]uint64{}
			for i, nd := range nodes[1:] {
				db, err := store.Open(b.TempDir(), store.Options{})
				if err != nil {
					b.Fatal(err)
				}
				defer db.Close()
				batch := &store.Batch{}
				for d := 0; d < n; d++ {
					id := fmt.Sprintf("dev-%05d", d)
					batch.Devices = append(batch.Devices, &store.Device{ID: id, Mode: "summary"})
					for q := uint64(1); q <= 4; q++ {
						batch.Chunks = append(batch.Chunks, store.Chunk{Device: id, Seq: 100*uint64(i) + q, DeviceTimeMS: 1_700_000_000_000, ArrivalMS: 1_700_000_000_000 + int64(q)})
					}
					ask[id] = [2]uint64{1, 500}
				}
				if err := db.Write(batch); err != nil {
					b.Fatal(err)
				}
				go nd.ServeHeld(ctx, db.LedgerHeld)
			}
			for len(nodes[0].Members()) < 3 {
				time.Sleep(10 * time.Millisecond)
			}
			var last map[string][]store.HeldRange
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				got, missing, err := nodes[0].Ask(ctx, ask, 30*time.Second)
				last = got["b:1"]
				if err != nil || len(missing) != 0 || len(got["b:1"]) != n {
					b.Fatalf("ask: %d devices answered by b, missing %v, %v", len(got["b:1"]), missing, err)
				}
			}
			b.StopTimer()
			q, _ := json.Marshal(askMsg{ID: 1, Devices: ask})
			a, _ := json.Marshal(answerMsg{ID: 1, Held: last})
			b.ReportMetric(float64(len(q)), "question-bytes")
			b.ReportMetric(float64(len(a)), "answer-bytes")
		})
	}
}
