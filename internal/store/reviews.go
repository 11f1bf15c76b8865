package store

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"sort"

	bolt "go.etcd.io/bbolt"
)

// Review is one operator's review of a stored alarm episode. A changed
// review is a new revision: earlier ones stay (reviews/EPISODE_ID|REVISION).
type Review struct {
	EpisodeID uint64 `json:"episode_id"`
	Revision  uint32 `json:"revision"` // 1 for the first review of the episode; assigned by the store
	Device    string `json:"device"`   // the episode's device, copied by the store
	Label     string `json:"label"`    // actionable, not-actionable, artefact or unsure (checked by the caller)
	Note      string `json:"note,omitempty"`
	Reviewer  string `json:"reviewer"`
	TimeMS    int64  `json:"time_ms"` // gateway clock when recorded, Unix ms
	Remote    string `json:"remote,omitempty"`
}

const reviewKeySize = 12 // EPISODE_ID (8) | REVISION (4)

func reviewKey(episode uint64, rev uint32) []byte {
	k := make([]byte, reviewKeySize)
	binary.BigEndian.PutUint64(k, episode)
	binary.BigEndian.PutUint32(k[8:], rev)
	return k
}

// PutReview records r as the newest review of its episode, with the audit
// entry, in one transaction; it returns the review as stored (revision and
// device filled in). An episode the store does not hold gives ErrNotFound.
func (db *DB) PutReview(r Review, audit *AuditEntry) (Review, error) {
	err := db.update(func(tx *bolt.Tx) error {
		v := tx.Bucket(bEpisodes).Get(u64(r.EpisodeID))
		if v == nil {
			return fmt.Errorf("episode %d: %w", r.EpisodeID, ErrNotFound)
		}
		var e Episode
		if err := decJSON(v, &e); err != nil {
			return fmt.Errorf("episode %d: %w", r.EpisodeID, err)
		}
		r.Device = e.Device
		b := tx.Bucket(bReviews)
		prefix := u64(r.EpisodeID)
		r.Revision = 1
		c := b.Cursor()
		// The last key with this episode's prefix: seek past it, step back.
		k, _ := c.Seek(reviewKey(r.EpisodeID+1, 0))
		if k == nil {
			k, _ = c.Last()
		} else {
			k, _ = c.Prev()
		}
		if k != nil && bytes.HasPrefix(k, prefix) && len(k) == reviewKeySize {
			r.Revision = binary.BigEndian.Uint32(k[8:]) + 1
		}
		val, err := encJSON(&r)
		if err != nil {
			return err
		}
		if err := b.Put(reviewKey(r.EpisodeID, r.Revision), val); err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
	return r, err
}

// ReviewFilter selects reviews; zero fields do not filter.
type ReviewFilter struct {
	Device   string
	Episodes []uint64 // only these episodes
	// History returns every revision (oldest first per episode); otherwise
	// only each episode's newest review.
	History bool
}

// Reviews returns matching reviews ordered by episode id (and revision).
// A store made before reviews existed (opened read-only) has none.
func (db *DB) Reviews(f ReviewFilter) ([]Review, error) {
	want := map[uint64]bool{}
	for _, id := range f.Episodes {
		want[id] = true
	}
	var out []Review
	err := db.view(func(tx *bolt.Tx) error {
		b := tx.Bucket(bReviews)
		if b == nil {
			return nil
		}
		return b.ForEach(func(k, v []byte) error {
			if len(want) > 0 && (len(k) < 8 || !want[binary.BigEndian.Uint64(k)]) {
				return nil
			}
			var r Review
			if err := decJSON(v, &r); err != nil {
				return fmt.Errorf("review %x: %w", k, err)
			}
			if f.Device != "" && r.Device != f.Device {
				return nil
			}
			if !f.History && len(out) > 0 && out[len(out)-1].EpisodeID == r.EpisodeID {
				out[len(out)-1] = r // keys are in revision order: the newest wins
				return nil
			}
			out = append(out, r)
			return nil
		})
	})
	sort.SliceStable(out, func(i, j int) bool {
		if out[i].EpisodeID != out[j].EpisodeID {
			return out[i].EpisodeID < out[j].EpisodeID
		}
		return out[i].Revision < out[j].Revision
	})
	return out, err
}

// reviewRecord is the verify check of one reviews/ record.
func reviewRecord(_ *checker, _ [][]byte, k, v []byte) error {
	if len(k) != reviewKeySize {
		return fmt.Errorf("key of %d bytes, want %d", len(k), reviewKeySize)
	}
	var r Review
	if err := decJSON(v, &r); err != nil {
		return fmt.Errorf("value does not decode: %v", err)
	}
	if r.EpisodeID != binary.BigEndian.Uint64(k) || r.Revision != binary.BigEndian.Uint32(k[8:]) || r.Revision == 0 {
		return fmt.Errorf("review of episode %d revision %d under key %x", r.EpisodeID, r.Revision, k)
	}
	if r.Label == "" || r.Reviewer == "" {
		return fmt.Errorf("review of episode %d revision %d without label or reviewer", r.EpisodeID, r.Revision)
	}
	return nil
}
