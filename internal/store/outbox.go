package store

import (
	"fmt"
	"slices"

	bolt "go.etcd.io/bbolt"
)

// OutboxEntry is a notification waiting for delivery (package notify sends
// it to Alertmanager): an announced alarm episode that changed since its
// last delivery. One entry per episode: a later change of the same episode
// bumps Gen, so delivery sends the episode as it is then, and an entry is
// removed only when every target accepted its latest generation.
type OutboxEntry struct {
	Episode uint64 `json:"episode"`
	// Gen counts the changes queued for the episode since the entry was
	// made; an acceptance of an older generation does not remove it.
	Gen uint64 `json:"gen"`
	// QueuedMS is when the oldest undelivered change was queued (gateway
	// clock, Unix ms): the entry's age is how late its delivery is.
	QueuedMS int64 `json:"queued_ms"`
	// Delivered lists the targets that accepted generation Gen.
	Delivered []string `json:"delivered,omitempty"`
	// FiringDone says every target had accepted the episode as firing
	// before this entry was made (its previous entry, for the announced
	// episode, was delivered everywhere and removed).
	FiringDone bool `json:"firing_done,omitempty"`
	// Fired maps a target to when it first accepted the episode as firing
	// (Unix ms, the notifier's clock); kept across generations and, for an
	// episode not yet ended, across entries (a new entry starts with the
	// times kept when the previous one was removed), so an ended episode's
	// resolution can wait until the alert has been firing at that target
	// for a minimum hold (package notify), also across a restart.
	Fired map[string]int64 `json:"fired,omitempty"`
}

// FiredAt reports when target had the episode firing: its Fired time;
// else FiringDone gives (0, true) (fired, time not known); else false.
func (e *OutboxEntry) FiredAt(target string) (int64, bool) {
	if t, ok := e.Fired[target]; ok {
		return t, true
	}
	return 0, e.FiringDone
}

// OutboxAcceptance is what one target accepted of one outbox entry.
type OutboxAcceptance struct {
	Episode uint64
	// Gen is the entry's generation the notification was built for.
	Gen uint64
	// FiringMS, when not 0, says the notification stated the episode as
	// firing, accepted at that time (Unix ms); the first such time per
	// target is kept in the entry's Fired.
	FiringMS int64
	// Partial says the notification is not the episode's final word for
	// this generation (an ended episode sent as firing because the target
	// never had it firing): the target does not count as delivered yet.
	Partial bool
}

var bOutbox = []byte("outbox")

// bOutboxFired keeps, per episode (key as in bOutbox), the Fired times of
// its entries (JSON target -> Unix ms) past the removal of an entry, so the
// entry made for the episode's next change (its end) starts with them. It
// is cleaned when an ended episode's entry is removed (delivered
// everywhere) and when the episode is deleted. It is made by the first
// firing time recorded, so a store that never had one opens with older
// binaries.
var bOutboxFired = []byte("outbox_fired")

// EnableOutbox makes Write queue a notification, in the same transaction,
// for every episode it writes that was announced (AnnouncedMS > 0): an
// announcement, an escalation, an end, an acknowledgement. Withdrawn
// episodes (never announced) are not queued. After a commit that queued
// any, kick is called (it must not block). Call it before the first Write
// of the process that delivers the outbox; a store without a deliverer
// leaves it off, so its outbox stays empty.
func (db *DB) EnableOutbox(kick func()) {
	if kick == nil {
		kick = func() {}
	}
	db.outboxKick.Store(&kick)
}

// storedAnnounced reports whether the stored version of episode id was
// announced.
func storedAnnounced(eps *bolt.Bucket, id uint64) bool {
	v := eps.Get(u64(id))
	if v == nil {
		return false
	}
	var old struct {
		AnnouncedMS int64 `json:"announced_ms"`
	}
	return decJSON(v, &old) == nil && old.AnnouncedMS > 0
}

// queueOutbox adds or bumps the outbox entries of the batch's announced
// episodes; it reports whether it queued any. wasAnnounced tells, per
// episode, whether its stored version before the batch was announced: a
// new entry for such an episode means the previous one was delivered to
// every target, so they all had it firing (FiringDone).
func queueOutbox(tx *bolt.Tx, eps []*Episode, wasAnnounced map[uint64]bool, nowMS int64) (bool, error) {
	ob := tx.Bucket(bOutbox)
	queued := false
	for _, e := range eps {
		if e.AnnouncedMS <= 0 {
			continue
		}
		k := u64(e.ID)
		ent := OutboxEntry{Episode: e.ID, QueuedMS: nowMS, FiringDone: wasAnnounced[e.ID]}
		if v := ob.Get(k); v != nil {
			ent = OutboxEntry{} // the entry's own FiringDone, not the new one's
			if err := decJSON(v, &ent); err != nil {
				return false, fmt.Errorf("outbox entry %d: %w", e.ID, err)
			}
		} else if fv := keptFiring(tx, k); fv != nil {
			if err := decJSON(fv, &ent.Fired); err != nil {
				return false, fmt.Errorf("outbox firing times %d: %w", e.ID, err)
			}
		}
		ent.Gen++
		ent.Delivered = nil
		v, err := encJSON(&ent)
		if err != nil {
			return false, err
		}
		if err := ob.Put(k, v); err != nil {
			return false, err
		}
		queued = true
	}
	return queued, nil
}

// Outbox returns up to limit waiting notifications (0 = all), oldest
// episode first, and how many wait in all.
func (db *DB) Outbox(limit int) ([]OutboxEntry, int, error) {
	var (
		out []OutboxEntry
		n   int
	)
	err := db.view(func(tx *bolt.Tx) error {
		ob := tx.Bucket(bOutbox)
		if ob == nil { // a read-only store made before the outbox existed
			return nil
		}
		n = ob.Stats().KeyN
		return ob.ForEach(func(k, v []byte) error {
			if limit > 0 && len(out) >= limit {
				return errStop
			}
			var e OutboxEntry
			if err := decJSON(v, &e); err != nil {
				return fmt.Errorf("outbox entry %x: %w", k, err)
			}
			out = append(out, e)
			return nil
		})
	})
	if err == errStop {
		err = nil
	}
	if err != nil {
		return nil, 0, fmt.Errorf("store: outbox: %w", err)
	}
	return out, n, nil
}

// OutboxAccepted records what target accepted (one transaction for all)
// and removes each entry once every one of targets has accepted its
// current generation in full. An entry whose generation moved on meanwhile
// is kept (the newer change must still go to every target), though a
// firing time is recorded all the same; an entry already gone is skipped.
// It returns how many entries it removed.
func (db *DB) OutboxAccepted(target string, targets []string, accepted []OutboxAcceptance) (int, error) {
	removed := 0
	err := db.update(func(tx *bolt.Tx) error {
		removed = 0
		ob := tx.Bucket(bOutbox)
		for _, a := range accepted {
			k := u64(a.Episode)
			v := ob.Get(k)
			if v == nil {
				continue
			}
			var e OutboxEntry
			if err := decJSON(v, &e); err != nil {
				return fmt.Errorf("outbox entry %d: %w", a.Episode, err)
			}
			changed := false
			if _, had := e.Fired[target]; a.FiringMS != 0 && !had && !e.FiringDone {
				if e.Fired == nil {
					e.Fired = map[string]int64{}
				}
				e.Fired[target] = a.FiringMS
				changed = true
				fb, err := tx.CreateBucketIfNotExists(bOutboxFired)
				if err != nil {
					return err
				}
				fv, err := encJSON(e.Fired)
				if err != nil {
					return err
				}
				if err := fb.Put(k, fv); err != nil {
					return err
				}
			}
			if e.Gen == a.Gen && !a.Partial && !slices.Contains(e.Delivered, target) {
				e.Delivered = append(e.Delivered, target)
				changed = true
			}
			all := true
			for _, t := range targets {
				all = all && slices.Contains(e.Delivered, t)
			}
			if all {
				removed++
				if err := ob.Delete(k); err != nil {
					return err
				}
				if fb := tx.Bucket(bOutboxFired); fb != nil && ended(tx, k) { // its last word delivered: the firing times are done with
					if err := fb.Delete(k); err != nil {
						return err
					}
				}
				continue
			}
			if !changed {
				continue
			}
			nv, err := encJSON(&e)
			if err != nil {
				return err
			}
			if err := ob.Put(k, nv); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return 0, fmt.Errorf("store: outbox: record %d accepted by %s: %w", len(accepted), target, err)
	}
	return removed, nil
}

// keptFiring returns the firing times kept for the episode with key k (nil
// when none).
func keptFiring(tx *bolt.Tx, k []byte) []byte {
	if fb := tx.Bucket(bOutboxFired); fb != nil {
		return fb.Get(k)
	}
	return nil
}

// ended reports whether the stored episode with key k has ended (or is
// gone).
func ended(tx *bolt.Tx, k []byte) bool {
	v := tx.Bucket(bEpisodes).Get(k)
	if v == nil {
		return true
	}
	var e struct {
		Active bool `json:"active"`
	}
	return decJSON(v, &e) == nil && !e.Active
}

// OutboxDrop removes an entry that can never be delivered (its episode is
// gone from the store); it returns whether there was one.
func (db *DB) OutboxDrop(episode uint64) (bool, error) {
	found := false
	err := db.update(func(tx *bolt.Tx) error {
		ob := tx.Bucket(bOutbox)
		k := u64(episode)
		found = ob.Get(k) != nil
		if fb := tx.Bucket(bOutboxFired); fb != nil {
			if err := fb.Delete(k); err != nil {
				return err
			}
		}
		return ob.Delete(k)
	})
	if err != nil {
		return false, fmt.Errorf("store: outbox: drop episode %d: %w", episode, err)
	}
	return found, nil
}

// Episode returns the stored episode with the given id (ErrNotFound when
// there is none).
func (db *DB) Episode(id uint64) (Episode, error) {
	var e Episode
	err := db.view(func(tx *bolt.Tx) error {
		v := tx.Bucket(bEpisodes).Get(u64(id))
		if v == nil {
			return ErrNotFound
		}
		return decJSON(v, &e)
	})
	if err != nil {
		return Episode{}, fmt.Errorf("store: episode %d: %w", id, err)
	}
	return e, nil
}
