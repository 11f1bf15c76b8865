package store

import (
	"errors"
	"path/filepath"
	"strings"
	"testing"

	bolt "go.etcd.io/bbolt"
)

// A changed review is a new revision: the newest is the review, every
// revision stays, each with its audit entry in the same transaction; a
// review of an episode the store does not hold is refused.
func TestReviewsKeepTheirHistory(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	e1 := &Episode{Device: "ward1-bed1", Condition: "spo2_low", Priority: "medium", OnsetMS: 1000, Active: true}
	e2 := &Episode{Device: "ward1-bed2", Condition: "spo2_low", Priority: "high", OnsetMS: 2000}
	if err := db.Write(&Batch{Episodes: []*Episode{e1, e2}}); err != nil {
		t.Fatal(err)
	}
	put := func(id uint64, label, who string, at int64) Review {
		t.Helper()
		r, err := db.PutReview(Review{EpisodeID: id, Label: label, Reviewer: who, TimeMS: at},
			&AuditEntry{TimeMS: at, Actor: who, Action: "episode.review", Detail: label})
		if err != nil {
			t.Fatal(err)
		}
		return r
	}
	if r := put(e1.ID, "unsure", "nurse-a", 10); r.Revision != 1 || r.Device != "ward1-bed1" {
		t.Errorf("first review stored as %+v, want revision 1 of ward1-bed1", r)
	}
	put(e2.ID, "artefact", "nurse-a", 11)
	if r := put(e1.ID, "actionable", "nurse-b", 12); r.Revision != 2 {
		t.Errorf("second review of episode %d: revision %d, want 2", e1.ID, r.Revision)
	}
	_, err = db.PutReview(Review{EpisodeID: 999, Label: "actionable", Reviewer: "x"}, nil)
	if !errors.Is(err, ErrNotFound) {
		t.Errorf("review of an unknown episode: %v, want ErrNotFound", err)
	}

	latest, err := db.Reviews(ReviewFilter{})
	if err != nil {
		t.Fatal(err)
	}
	if len(latest) != 2 || latest[0].Label != "actionable" || latest[0].Reviewer != "nurse-b" || latest[1].Label != "artefact" {
		t.Errorf("newest reviews %+v, want episode %d actionable by nurse-b and episode %d artefact", latest, e1.ID, e2.ID)
	}
	hist, _ := db.Reviews(ReviewFilter{History: true, Episodes: []uint64{e1.ID}})
	if len(hist) != 2 || hist[0].Label != "unsure" || hist[1].Label != "actionable" {
		t.Errorf("history of episode %d: %+v, want unsure then actionable", e1.ID, hist)
	}
	byDev, _ := db.Reviews(ReviewFilter{Device: "ward1-bed2", History: true})
	if len(byDev) != 1 || byDev[0].EpisodeID != e2.ID {
		t.Errorf("reviews of ward1-bed2: %+v, want the one of episode %d", byDev, e2.ID)
	}
	audit, _ := db.Audit(0, "episode.review", 0)
	if len(audit) != 3 {
		t.Errorf("%d audit entries, want 3 (one per stored review, none for the refused one)", len(audit))
	}

	db.Close()
	rep, err := VerifyDir(dir, VerifyOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if !rep.OK() || rep.Records["reviews"] != 3 {
		t.Errorf("verify: problems %v, %d review records, want none and 3", rep.Problems, rep.Records["reviews"])
	}
}

// Verify names a review record whose key and content disagree.
func TestVerifyFindsAMisfiledReview(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	db.Close()
	path := filepath.Join(dir, FileName)
	b, err := bolt.Open(path, 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	err = b.Update(func(tx *bolt.Tx) error {
		v, _ := encJSON(&Review{EpisodeID: 5, Revision: 1, Label: "actionable", Reviewer: "a"})
		return tx.Bucket(bReviews).Put(reviewKey(4, 1), v)
	})
	b.Close()
	if err != nil {
		t.Fatal(err)
	}
	rep, err := VerifyFile(path, VerifyOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if all := strings.Join(rep.Problems, "\n"); !strings.Contains(all, "reviews/") || !strings.Contains(all, "review of episode 5 revision 1 under key") {
		t.Errorf("verify problems %q, want the misfiled review named", all)
	}
}
