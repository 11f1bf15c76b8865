package store

import (
	"errors"
	"testing"

	bolt "go.etcd.io/bbolt"
)

// The outbox is written in the transaction that writes the episode, only
// for announced episodes and only when enabled; an entry leaves only when
// every target accepted its latest generation, and it survives a reopen.
func TestOutboxQueuesInTheEpisodeTransaction(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	// Off: nothing queued.
	if err := db.Write(&Batch{Episodes: []*Episode{{ID: 7, Device: "d1", Condition: "spo2_low", Priority: "high", OnsetMS: 1000, AnnouncedMS: 16000, Active: true}}}); err != nil {
		t.Fatal(err)
	}
	if _, n, _ := db.Outbox(0); n != 0 {
		t.Fatalf("outbox off, but %d entries queued", n)
	}
	kicks := 0
	db.EnableOutbox(func() { kicks++ })
	ann := &Episode{ID: 8, Device: "d1", Condition: "spo2_low", Priority: "high", OnsetMS: 1000, AnnouncedMS: 16000, Active: true}
	withdrawn := &Episode{ID: 9, Device: "d1", Condition: "pulse_high", Priority: "medium", OnsetMS: 1000, EndedMS: 3000}
	if err := db.Write(&Batch{Episodes: []*Episode{ann, withdrawn}}); err != nil {
		t.Fatal(err)
	}
	got, n, err := db.Outbox(0)
	if err != nil || n != 1 || len(got) != 1 || got[0].Episode != 8 || got[0].Gen != 1 || got[0].QueuedMS == 0 {
		t.Fatalf("outbox after one announced and one withdrawn episode: %+v (n %d, err %v)", got, n, err)
	}
	if kicks != 1 {
		t.Errorf("kick called %d times, want 1", kicks)
	}
	queued := got[0].QueuedMS
	targets := []string{"http://am-a", "http://am-b"}
	if gone, err := db.OutboxAccepted(targets[0], targets, []OutboxAcceptance{{Episode: 8, Gen: 1}}); err != nil || gone != 0 {
		t.Fatalf("accepted by one of two targets: removed %d, err %v", gone, err)
	}
	// The episode ends before the second target accepted generation 1:
	// generation 2 must reach both, and the acceptance of 1 removes nothing.
	ann.Active, ann.EndedMS = false, 40000
	if err := db.Write(&Batch{Episodes: []*Episode{ann}}); err != nil {
		t.Fatal(err)
	}
	if gone, err := db.OutboxAccepted(targets[1], targets, []OutboxAcceptance{{Episode: 8, Gen: 1}}); err != nil || gone != 0 {
		t.Fatalf("a stale generation removed the entry: removed %d, err %v", gone, err)
	}
	got, _, _ = db.Outbox(0)
	if len(got) != 1 || got[0].Gen != 2 || len(got[0].Delivered) != 0 || got[0].QueuedMS != queued {
		t.Fatalf("after the end: %+v, want generation 2, delivered to none, queued at %d", got, queued)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	// A restart (here: a reopen without EnableOutbox) keeps the entry.
	db, err = Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	db.EnableOutbox(nil)
	defer func() { db.Close() }()
	if got, _, _ = db.Outbox(0); len(got) != 1 || got[0].Gen != 2 {
		t.Fatalf("after reopen: %+v", got)
	}
	for i, tg := range targets {
		// Episode 77 has no entry: skipped.
		gone, err := db.OutboxAccepted(tg, targets, []OutboxAcceptance{{Episode: 8, Gen: 2}, {Episode: 77, Gen: 1}})
		if err != nil || gone != i {
			t.Fatalf("accepted by %s: removed %d, err %v", tg, gone, err)
		}
	}
	if _, n, _ := db.Outbox(0); n != 0 {
		t.Fatalf("%d entries left after both targets accepted", n)
	}
	e, err := db.Episode(8)
	if err != nil || e.EndedMS != 40000 {
		t.Fatalf("Episode(8) = %+v, %v", e, err)
	}
	if _, err := db.Episode(99); !errors.Is(err, ErrNotFound) {
		t.Fatalf("Episode(99): %v, want ErrNotFound", err)
	}
	// An entry left in the file passes the full check.
	if err := db.Write(&Batch{Episodes: []*Episode{{ID: 10, Device: "d1", Condition: "spo2_low", Priority: "low", AnnouncedMS: 5}}}); err != nil {
		t.Fatal(err)
	}
	db.Close()
	rep, err := VerifyDir(dir, VerifyOptions{})
	if err != nil || !rep.OK() {
		t.Fatalf("verify: %+v %v", rep, err)
	}
	db, _ = Open(dir, Options{})
}

// A failed write queues nothing: the outbox entry and the episode commit
// together or not at all.
func TestOutboxRollsBackWithAFailedWrite(t *testing.T) {
	db, _ := mustOpen(t)
	db.EnableOutbox(nil)
	db.InjectWriteFault(func(*Batch) error { return errors.New("injected") })
	if err := db.Write(&Batch{Episodes: []*Episode{{ID: 3, Device: "d", Condition: "spo2_low", Priority: "high", AnnouncedMS: 5}}}); err == nil {
		t.Fatal("write with a fault succeeded")
	}
	db.InjectWriteFault(nil)
	if _, n, _ := db.Outbox(0); n != 0 {
		t.Fatalf("a failed write left %d outbox entries", n)
	}
}

// The outbox remembers, per target, when it first had an episode firing
// (kept across generations, also from a stale generation's acceptance),
// does not count a partial acceptance as delivered, and marks a new entry
// of an episode whose previous entry was delivered everywhere FiringDone;
// an episode first stored announced (or twice in one batch) is not.
func TestOutboxFiringRecord(t *testing.T) {
	db, err := Open(t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	db.EnableOutbox(nil)
	targets := []string{"A", "B"}
	ep := &Episode{ID: 20, Device: "d", Condition: "spo2_low", Priority: "high", OnsetMS: 1000, Active: true}
	write := func(eps ...*Episode) {
		t.Helper()
		if err := db.Write(&Batch{Episodes: eps}); err != nil {
			t.Fatal(err)
		}
	}
	entry := func() (OutboxEntry, bool) {
		t.Helper()
		ents, _, err := db.Outbox(0)
		if err != nil {
			t.Fatal(err)
		}
		for _, e := range ents {
			if e.Episode == 20 {
				return e, true
			}
		}
		return OutboxEntry{}, false
	}
	accept := func(target string, a OutboxAcceptance) {
		t.Helper()
		if _, err := db.OutboxAccepted(target, targets, []OutboxAcceptance{a}); err != nil {
			t.Fatal(err)
		}
	}
	write(ep) // stored at onset, not announced: no entry
	ep.AnnouncedMS = 16000
	write(ep)
	if e, ok := entry(); !ok || e.FiringDone {
		t.Fatalf("first announced write: %+v %v, want an entry without FiringDone", e, ok)
	}
	accept("A", OutboxAcceptance{Episode: 20, Gen: 1, FiringMS: 100})
	ep.Active, ep.EndedMS = false, 30000
	write(ep)
	accept("B", OutboxAcceptance{Episode: 20, Gen: 1, FiringMS: 200})                // stale generation: firing recorded, not delivered
	accept("B", OutboxAcceptance{Episode: 20, Gen: 2, FiringMS: 300, Partial: true}) // late firing: not delivered
	e, ok := entry()
	if !ok || e.Gen != 2 || e.Fired["A"] != 100 || e.Fired["B"] != 200 || len(e.Delivered) != 0 {
		t.Fatalf("entry %+v (present %v), want gen 2, fired A at 100 and B at 200, delivered to none", e, ok)
	}
	if _, fired := e.FiredAt("C"); fired {
		t.Error("FiredAt of a target that never had it says fired")
	}
	accept("A", OutboxAcceptance{Episode: 20, Gen: 2})
	accept("B", OutboxAcceptance{Episode: 20, Gen: 2})
	if _, ok := entry(); ok {
		t.Fatal("entry still there after both targets accepted generation 2 in full")
	}
	ep.AckedMS, ep.AckedBy = 40000, "nurse"
	write(ep)
	if e, ok = entry(); !ok || !e.FiringDone || e.Gen != 1 {
		t.Fatalf("entry after a later change of a delivered episode: %+v %v, want FiringDone", e, ok)
	}
	if at, fired := e.FiredAt("C"); !fired || at != 0 {
		t.Error("FiredAt of a FiringDone entry")
	}
	// New episode written twice in one batch, announced both times: its
	// stored version before the batch did not exist.
	n1 := &Episode{ID: 21, Device: "d", Condition: "pulse_low", Priority: "medium", OnsetMS: 1000, AnnouncedMS: 5000, Active: true}
	n2 := *n1
	n2.Active, n2.EndedMS = false, 9000
	write(n1, &n2)
	ents, _, _ := db.Outbox(0)
	for _, x := range ents {
		if x.Episode == 21 && x.FiringDone {
			t.Errorf("episode announced and ended in one batch marked FiringDone: %+v", x)
		}
	}
}

// The firing times outlive the entry that recorded them while the episode
// is active: the entry made for its end starts with them (so notify can
// hold a resolution that comes soon after the firing), and they are gone
// once the ended episode's entry is delivered everywhere.
func TestOutboxFiringTimesOutliveTheEntry(t *testing.T) {
	db, err := Open(t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	db.EnableOutbox(nil)
	targets := []string{"A", "B"}
	ep := &Episode{ID: 30, Device: "d", Condition: "spo2_low", Priority: "high", OnsetMS: 1000, AnnouncedMS: 2000, Active: true}
	write := func() {
		t.Helper()
		if err := db.Write(&Batch{Episodes: []*Episode{ep}}); err != nil {
			t.Fatal(err)
		}
	}
	acceptAll := func(gen uint64, firingMS int64) {
		t.Helper()
		for i, tg := range targets {
			a := OutboxAcceptance{Episode: 30, Gen: gen}
			if firingMS != 0 {
				a.FiringMS = firingMS + int64(i)
			}
			if _, err := db.OutboxAccepted(tg, targets, []OutboxAcceptance{a}); err != nil {
				t.Fatal(err)
			}
		}
	}
	kept := func() []byte {
		var v []byte
		db.view(func(tx *bolt.Tx) error { v = append(v, keptFiring(tx, u64(30))...); return nil })
		return v
	}
	write()
	acceptAll(1, 5000)
	if ents, _, _ := db.Outbox(0); len(ents) != 0 {
		t.Fatalf("outbox %+v after both accepted the firing state", ents)
	}
	if kept() == nil {
		t.Fatal("firing times not kept after the active episode's entry was removed")
	}
	ep.Active, ep.EndedMS = false, 6000
	write()
	ents, _, _ := db.Outbox(0)
	if len(ents) != 1 || !ents[0].FiringDone || ents[0].Fired["A"] != 5000 || ents[0].Fired["B"] != 5001 {
		t.Fatalf("entry for the end %+v, want FiringDone with A fired at 5000 and B at 5001", ents)
	}
	if at, ok := ents[0].FiredAt("B"); !ok || at != 5001 {
		t.Errorf("FiredAt(B) = %d, %v; want 5001", at, ok)
	}
	acceptAll(1, 0)
	if ents, _, _ := db.Outbox(0); len(ents) != 0 {
		t.Fatalf("outbox %+v after both accepted the end", ents)
	}
	if v := kept(); v != nil {
		t.Errorf("firing times %s still kept after the ended episode was delivered everywhere", v)
	}
}
