package store

import (
	"errors"
	"fmt"
	"strings"
	"testing"
	"time"
)

func utcMS(s string) int64 {
	t, err := time.Parse(time.RFC3339, s)
	if err != nil {
		panic(err)
	}
	return t.UnixMilli()
}

// wardTimeline enrols the timeline of internal/participants' tests:
//
//	P-0001  OX-A   2026-12-01 20:00 .. 2026-12-02 03:00  (battery fails at 03:00)
//	P-0001  OX-B   2026-12-02 03:10 .. 2026-12-02 08:00  (swap at night)
//	P-0002  OX-A   2026-12-02 10:00 .. open              (reused for the next participant)
//
// entered after the data are stored, as a study team does the morning after.
func wardTimeline(t *testing.T, db *DB) {
	t.Helper()
	for _, e := range []Enrolment{
		{Participant: "P-0001", Device: "OX-A", FromMS: utcMS("2026-12-01T20:00:00Z"), ToMS: utcMS("2026-12-02T03:00:00Z"), Note: "bed 4"},
		{Participant: "P-0001", Device: "OX-B", FromMS: utcMS("2026-12-02T03:10:00Z"), ToMS: utcMS("2026-12-02T08:00:00Z"), Note: "swap: OX-A battery"},
		{Participant: "P-0002", Device: "OX-A", FromMS: utcMS("2026-12-02T10:00:00Z")},
	} {
		if _, err := db.Enrol(e, &AuditEntry{Actor: "nurse", Action: "participants.enrol"}); err != nil {
			t.Fatal(err)
		}
	}
}

// wardPoints stores one point a minute (at whole minutes):
//
//	OX-A  2026-12-01 19:00 .. 2026-12-02 11:59   17 h  = 1020 points
//	OX-B  2026-12-02 03:05 .. 2026-12-02 08:59   355 points
func wardPoints(t *testing.T, db *DB) {
	t.Helper()
	b := &Batch{Devices: []*Device{{ID: "OX-A"}, {ID: "OX-B"}}}
	add := func(dev string, from string, n int) {
		t0 := utcMS(from)
		for i := 0; i < n; i++ {
			b.Points = append(b.Points, Point{Device: dev, TimeMS: t0 + int64(i)*60_000, SpO2: 95, Pulse: 70, PI: 1, SQI: 0.9, Source: 2})
		}
	}
	add("OX-A", "2026-12-01T19:00:00Z", 1020)
	add("OX-B", "2026-12-02T03:05:00Z", 355)
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
}

func TestEnrolmentTimeline(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	wardPoints(t, db)
	wardTimeline(t, db)

	count := func(pid string) map[string]int {
		n := map[string]int{}
		err := db.ParticipantTrend(pid, utcMS("2026-12-01T00:00:00Z"), utcMS("2026-12-03T00:00:00Z"), func(p Point) bool { n[p.Device]++; return true })
		if err != nil {
			t.Fatal(err)
		}
		return n
	}
	// P-0001: OX-A 20:00..03:00 = 7 h = 420 points; OX-B 03:10..08:00 = 4 h 50 = 290.
	// (OX-B's 03:05..03:09 and 08:00..08:59 belong to nobody.)
	if got := count("P-0001"); got["OX-A"] != 420 || got["OX-B"] != 290 || len(got) != 2 {
		t.Errorf("P-0001 stitched: %v, want OX-A 420, OX-B 290", got)
	}
	// P-0002: OX-A 10:00..11:59 = 120 points. Sum check for OX-A: 60 before
	// P-0001 + 420 + 420 unassigned (03:00..10:00) + 120 = 1020.
	if got := count("P-0002"); got["OX-A"] != 120 || len(got) != 1 {
		t.Errorf("P-0002 stitched: %v, want OX-A 120", got)
	}

	// A third participant on OX-B from 07:00 collides with P-0001 until 08:00.
	_, err = db.Enrol(Enrolment{Participant: "P-0003", Device: "OX-B", FromMS: utcMS("2026-12-02T07:00:00Z")}, nil)
	if !errors.Is(err, ErrConflict) || !strings.Contains(err.Error(), "already enrolled to P-0001 for 2026-12-02T03:10:00Z..2026-12-02T08:00:00Z") ||
		!strings.Contains(err.Error(), "P-0003 for 2026-12-02T07:00:00Z..open") {
		t.Errorf("overlap: %v", err)
	}
	// Bad fields are refused naming the field.
	for _, c := range []struct {
		e    Enrolment
		want string
	}{
		{Enrolment{Participant: "Maria", Device: "OX-C", FromMS: 1}, "participant: "},
		{Enrolment{Participant: "P-0009", Device: "OX C", FromMS: 1}, "device: "},
		{Enrolment{Participant: "P-0009", Device: "OX-C", FromMS: 5000, ToMS: 4000}, "to: "},
		{Enrolment{Participant: "P-0009", Device: "OX-C", FromMS: 1, Note: strings.Repeat("x", 201)}, "note: 201 bytes, want at most 200"},
	} {
		if _, err := db.Enrol(c.e, nil); !errors.Is(err, ErrInvalid) || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%+v: %v, want %q", c.e, err, c.want)
		}
	}

	// Ending: P-0002's open enrolment ends at 12:00; P-0001 has none open.
	e, err := db.EndEnrolment("P-0002", "", utcMS("2026-12-02T12:00:00Z"), &AuditEntry{Actor: "nurse", Action: "participants.end"})
	if err != nil || e.ToMS != utcMS("2026-12-02T12:00:00Z") || e.Device != "OX-A" {
		t.Fatalf("end: %+v %v", e, err)
	}
	if _, err := db.EndEnrolment("P-0001", "", utcMS("2026-12-02T12:00:00Z"), nil); !errors.Is(err, ErrNotFound) {
		t.Errorf("end without open enrolment: %v", err)
	}
	// Now OX-A is free from 12:00 on.
	if _, err := db.Enrol(Enrolment{Participant: "P-0003", Device: "OX-A", FromMS: utcMS("2026-12-02T12:00:00Z")}, nil); err != nil {
		t.Errorf("OX-A after P-0002 ended: %v", err)
	}
	es, err := db.Enrolments("", "OX-A")
	if err != nil || len(es) != 3 || es[0].Participant != "P-0001" || es[2].Participant != "P-0003" || es[0].Note != "bed 4" {
		t.Errorf("OX-A enrolments %+v %v", es, err)
	}
	if a, _ := db.Audit(0, "participants.", 0); len(a) != 4 {
		t.Errorf("audit holds %d participants entries, want 4 (3 enrolments, 1 end)", len(a))
	}
	db.Close()
	rep, err := VerifyDir(dir, VerifyOptions{})
	if err != nil || !rep.OK() || rep.Records["enrolments"] != 4 {
		t.Errorf("verify: %+v %v", rep, err)
	}
}

// Withdrawal in the store: P-0001's points, raw captures and episodes go,
// everything else stays byte for byte, and the audit says what happened.
func TestDeleteParticipant(t *testing.T) {
	db, _ := mustOpen(t)
	wardPoints(t, db)
	wardTimeline(t, db)
	// Raw captures of OX-A, one every 30 min from 19:00 to 11:30 (34):
	// inside P-0001's 20:00..03:00 are 20:00, 20:30, ..., 02:30 = 14.
	// Episodes: OX-A at 01:00 (P-0001's), OX-A at 19:30 (nobody's), OX-B
	// at 05:00 (P-0001's), OX-A at 10:30 (P-0002's).
	b := &Batch{}
	t0 := utcMS("2026-12-01T19:00:00Z")
	for i := int64(0); i < 34; i++ {
		b.Raw = append(b.Raw, RawCapture{Device: "OX-A", Seq: uint64(i + 1), DeviceTimeMS: t0 + i*1_800_000, RateHz: 100, Red: []uint32{1, 2}, IR: []uint32{3, 4}})
	}
	for _, e := range []struct{ dev, at string }{{"OX-A", "2026-12-02T01:00:00Z"}, {"OX-A", "2026-12-01T19:30:00Z"}, {"OX-B", "2026-12-02T05:00:00Z"}, {"OX-A", "2026-12-02T10:30:00Z"}} {
		b.Episodes = append(b.Episodes, &Episode{Device: e.dev, Condition: "spo2_low", Priority: "medium", OnsetMS: utcMS(e.at), EndedMS: utcMS(e.at) + 60_000, MinSpO2: 84})
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	// Reviews: two revisions of P-0001's OX-A episode, one of P-0002's.
	for _, r := range []struct {
		ep    *Episode
		label string
	}{{b.Episodes[0], "unsure"}, {b.Episodes[0], "actionable"}, {b.Episodes[3], "artefact"}} {
		if _, err := db.PutReview(Review{EpisodeID: r.ep.ID, Label: r.label, Reviewer: "nurse"}, nil); err != nil {
			t.Fatal(err)
		}
	}
	// Everything that is not P-0001's, read before.
	dump := func() string {
		var sb strings.Builder
		for _, w := range []struct {
			dev      string
			from, to string
		}{{"OX-A", "2026-12-01T00:00:00Z", "2026-12-01T20:00:00Z"}, {"OX-A", "2026-12-02T03:00:00Z", "2026-12-03T00:00:00Z"},
			{"OX-B", "2026-12-01T00:00:00Z", "2026-12-02T03:10:00Z"}, {"OX-B", "2026-12-02T08:00:00Z", "2026-12-03T00:00:00Z"}} {
			_ = db.Trend(w.dev, utcMS(w.from), utcMS(w.to), func(p Point) bool { sb.WriteString(fmt.Sprintf("%+v\n", p)); return true })
			_ = db.RawCaptures(w.dev, utcMS(w.from), utcMS(w.to), func(r RawCapture) bool { sb.WriteString(fmt.Sprintf("%+v\n", r)); return true })
		}
		rs, _ := db.Reviews(ReviewFilter{History: true})
		for _, r := range rs {
			if r.EpisodeID != b.Episodes[0].ID {
				sb.WriteString(fmt.Sprintf("%+v\n", r))
			}
		}
		eps, _ := db.Episodes(EpisodeFilter{})
		for _, e := range eps {
			if !(e.Device == "OX-A" && e.OnsetMS == utcMS("2026-12-02T01:00:00Z")) && !(e.Device == "OX-B" && e.OnsetMS == utcMS("2026-12-02T05:00:00Z")) {
				sb.WriteString(fmt.Sprintf("%+v\n", e))
			}
		}
		return sb.String()
	}
	before := dump()
	del, err := db.DeleteParticipant("P-0001", utcMS("2026-12-05T09:00:00Z"), "admin-ro", "127.0.0.1")
	if err != nil {
		t.Fatal(err)
	}
	// 420 + 290 points (TestEnrolmentTimeline), 14 raw captures, 2 episodes.
	if del.TrendPoints != 710 || del.RawCaptures != 14 || del.Episodes != 2 || del.Reviews != 2 || len(del.Enrolments) != 2 {
		t.Errorf("deleted %+v, want 710 points, 14 raw, 2 episodes, 2 reviews, 2 enrolments", del)
	}
	if rs, _ := db.Reviews(ReviewFilter{History: true, Episodes: []uint64{b.Episodes[0].ID}}); len(rs) != 0 {
		t.Errorf("reviews of a deleted episode survive: %+v", rs)
	}
	n := 0
	_ = db.ParticipantTrend("P-0001", 0, 1<<62, func(Point) bool { n++; return true })
	for _, w := range []struct{ dev, from, to string }{{"OX-A", "2026-12-01T20:00:00Z", "2026-12-02T03:00:00Z"}, {"OX-B", "2026-12-02T03:10:00Z", "2026-12-02T08:00:00Z"}} {
		_ = db.Trend(w.dev, utcMS(w.from), utcMS(w.to), func(Point) bool { n++; return true })
		_ = db.RawCaptures(w.dev, utcMS(w.from), utcMS(w.to), func(RawCapture) bool { n++; return true })
	}
	if n != 0 {
		t.Errorf("%d records of P-0001 still readable", n)
	}
	if after := dump(); after != before {
		t.Errorf("other data changed:\n%s\nwant\n%s", after, before)
	}
	a, _ := db.Audit(0, "participants.delete", 0)
	if len(a) != 1 || a[0].ID != del.AuditID || a[0].Actor != "admin-ro" || !strings.Contains(a[0].Detail,
		"deleted 710 trend points, 14 raw captures, 2 episodes, 2 reviews in OX-A 2026-12-01T20:00:00Z..2026-12-02T03:00:00Z, OX-B 2026-12-02T03:10:00Z..2026-12-02T08:00:00Z") {
		t.Errorf("audit %+v", a)
	}
	if _, err := db.DeleteParticipant("P-0001", 0, "admin-ro", ""); !errors.Is(err, ErrNotFound) {
		t.Errorf("second delete: %v", err)
	}
	if _, err := db.DeleteParticipant("P-0002", 0, "admin-ro", ""); !errors.Is(err, ErrStillOpen) {
		t.Errorf("delete while open: %v", err)
	}
	// P-0002's enrolment ends, but its episode at 10:30 is still active:
	// refused (the engine would write it back), and nothing is deleted.
	if _, err := db.EndEnrolment("P-0002", "", utcMS("2026-12-02T12:00:00Z"), nil); err != nil {
		t.Fatal(err)
	}
	act := *b.Episodes[3]
	act.Active, act.EndedMS = true, 0
	if err := db.Write(&Batch{Episodes: []*Episode{&act}}); err != nil {
		t.Fatal(err)
	}
	if _, err := db.DeleteParticipant("P-0002", 0, "admin-ro", ""); !errors.Is(err, ErrStillOpen) || !strings.Contains(err.Error(), "still active") {
		t.Errorf("delete with an active episode: %v", err)
	}
	if es, _ := db.Enrolments("P-0002", ""); len(es) != 1 {
		t.Errorf("a refused deletion changed the enrolments: %+v", es)
	}
}

// BenchmarkDeleteParticipant measures the withdrawal of a participant with
// one night (8 h at 1 Hz: 28,800 trend points) on one device, in a store
// that also holds another participant's night on another device: with the
// night still in the recent log (the deletion compacts it first, 57,600
// points of both devices) and already in the day buckets.
func BenchmarkDeleteParticipant(b *testing.B) {
	for _, compacted := range []bool{false, true} {
		name := "recent-log"
		if compacted {
			name = "compacted"
		}
		b.Run(name, func(b *testing.B) { benchDelete(b, compacted) })
	}
}

func benchDelete(b *testing.B, compacted bool) {
	const night = 8 * 3600
	for i := 0; i < b.N; i++ {
		b.StopTimer()
		db, _ := mustOpen(b)
		t0 := utcMS("2026-12-01T22:00:00Z")
		batch := &Batch{}
		for j := int64(0); j < night; j++ {
			for _, dev := range []string{"OX-A", "OX-B"} {
				batch.Points = append(batch.Points, Point{Device: dev, TimeMS: t0 + j*1000, SpO2: 96, Pulse: 60, PI: 1, SQI: 1})
			}
		}
		if err := db.Write(batch); err != nil {
			b.Fatal(err)
		}
		for _, e := range []Enrolment{{Participant: "P-0001", Device: "OX-A", FromMS: t0, ToMS: t0 + night*1000}, {Participant: "P-0002", Device: "OX-B", FromMS: t0}} {
			if _, err := db.Enrol(e, nil); err != nil {
				b.Fatal(err)
			}
		}
		if compacted {
			if err := db.CompactAll(); err != nil {
				b.Fatal(err)
			}
		}
		b.StartTimer()
		del, err := db.DeleteParticipant("P-0001", 0, "bench", "")
		if err != nil || del.TrendPoints != night {
			b.Fatalf("%+v %v", del, err)
		}
	}
	b.ReportMetric(float64(b.N*night)/b.Elapsed().Seconds(), "points/s")
}
