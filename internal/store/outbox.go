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
}

var bOutbox = []byte("outbox")

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

// queueOutbox adds or bumps the outbox entries of the batch's announced
// episodes; it reports whether it queued any.
func queueOutbox(tx *bolt.Tx, eps []*Episode, nowMS int64) (bool, error) {
	ob := tx.Bucket(bOutbox)
	queued := false
	for _, e := range eps {
		if e.AnnouncedMS <= 0 {
			continue
		}
		k := u64(e.ID)
		ent := OutboxEntry{Episode: e.ID, QueuedMS: nowMS}
		if v := ob.Get(k); v != nil {
			if err := decJSON(v, &ent); err != nil {
				return false, fmt.Errorf("outbox entry %d: %w", e.ID, err)
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

// OutboxAccepted records that target accepted the given generations of
// notifications (one transaction for all), and removes each entry once
// every one of targets has accepted its generation. An entry whose
// generation moved on meanwhile is kept (the newer change must still go to
// every target); an entry already gone is skipped. It returns how many
// entries it removed.
func (db *DB) OutboxAccepted(target string, targets []string, accepted []OutboxEntry) (int, error) {
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
			if e.Gen != a.Gen {
				continue
			}
			if !slices.Contains(e.Delivered, target) {
				e.Delivered = append(e.Delivered, target)
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

// OutboxDrop removes an entry that can never be delivered (its episode is
// gone from the store); it returns whether there was one.
func (db *DB) OutboxDrop(episode uint64) (bool, error) {
	found := false
	err := db.update(func(tx *bolt.Tx) error {
		ob := tx.Bucket(bOutbox)
		k := u64(episode)
		found = ob.Get(k) != nil
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
