package store

import (
	"errors"
	"math"
	"testing"
	"time"
)

// mustOpen opens a store in a temporary directory and checks the file's
// integrity when the test ends.
func mustOpen(t testing.TB) (*DB, string) {
	t.Helper()
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if err := db.Check(); err != nil {
			t.Errorf("integrity: %v", err)
		}
		db.Close()
	})
	return db, dir
}

const day = int64(86_400_000)

func TestTrendRoundTripAcrossDays(t *testing.T) {
	db, _ := mustOpen(t)
	dev := &Device{ID: "ward3-bed2", Mode: "summary"}
	b := &Batch{Devices: []*Device{dev}}
	start := 20*day - 30_000 // 30 s before midnight: the range crosses a day bucket
	for i := int64(0); i < 60; i++ {
		spo2 := 95.0 + float64(i%3)
		if i == 10 {
			spo2 = math.NaN()
		}
		b.Points = append(b.Points, Point{Device: dev.ID, TimeMS: start + i*1000, SpO2: spo2, Pulse: 70, PI: 1.5, SQI: 0.9, Ratio: math.NaN(), Source: 2})
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	var got []Point
	if err := db.Trend(dev.ID, start+5000, start+45000, func(p Point) bool { got = append(got, p); return true }); err != nil {
		t.Fatal(err)
	}
	if len(got) != 40 {
		t.Fatalf("got %d points in [5 s, 45 s), want 40", len(got))
	}
	if got[0].TimeMS != start+5000 || got[39].TimeMS != start+44000 {
		t.Errorf("range ends %d..%d", got[0].TimeMS-start, got[39].TimeMS-start)
	}
	if !math.IsNaN(got[5].SpO2) || !math.IsNaN(got[0].Ratio) {
		t.Errorf("missing values must stay missing: %+v", got[5])
	}
	if got[1].SpO2 != 95+float64(6%3) || got[1].Source != 2 || got[1].Device != dev.ID {
		t.Errorf("point 6: %+v", got[1])
	}
	bk, err := db.TrendBuckets(dev.ID, start, start+60_000, 30_000)
	if err != nil {
		t.Fatal(err)
	}
	var n uint32
	for _, x := range bk {
		n += x.Points
		if x.SpO2.Min < 95 || x.SpO2.Max > 97 || x.SpO2.Mean < x.SpO2.Min || x.SpO2.Mean > x.SpO2.Max {
			t.Errorf("bucket %+v out of range", x)
		}
	}
	if n != 60 {
		t.Errorf("buckets hold %d points, want 60", n)
	}
	// The NaN point counts as a point but not as a valid SpO2.
	var valid uint32
	for _, x := range bk {
		valid += x.SpO2.Count
	}
	if valid != 59 {
		t.Errorf("valid SpO2 count %d, want 59", valid)
	}
}

func TestLedgerTotalsAndReopen(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	devs := []*Device{{ID: "a"}, {ID: "b"}}
	b := &Batch{Devices: devs}
	for s := uint64(1); s <= 10; s++ {
		b.Chunks = append(b.Chunks, Chunk{Device: "a", Seq: s, ArrivalMS: 1000 * int64(s), Samples: 25})
	}
	b.Chunks = append(b.Chunks, Chunk{Device: "b", Seq: 7, ArrivalMS: 5, Samples: 0})
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if devs[0].Index == 0 || devs[1].Index == devs[0].Index {
		t.Fatalf("indices not assigned: %d %d", devs[0].Index, devs[1].Index)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	db, err = Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	// A device known only from the file gets its old index back.
	if err := db.Write(&Batch{Chunks: []Chunk{{Device: "a", Seq: 11, ArrivalMS: 99_000, Samples: 25}}}); err != nil {
		t.Fatal(err)
	}
	tot, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if a := tot["a"]; a.Chunks != 11 || a.Samples != 275 || a.MaxSeq != 11 || !a.Distinct {
		t.Errorf("a: %+v", a)
	}
	if b := tot["b"]; b.Chunks != 1 || b.MaxSeq != 7 {
		t.Errorf("b: %+v", b)
	}
	if err := db.Write(&Batch{Chunks: []Chunk{{Device: "ghost", Seq: 1}}}); err == nil {
		t.Error("a ledger record for an unknown device must be refused")
	}
}

func TestSecondOpenIsLocked(t *testing.T) {
	_, dir := mustOpen(t)
	_, err := Open(dir, Options{Timeout: 50 * time.Millisecond})
	if !errors.Is(err, ErrLocked) {
		t.Fatalf("second open: %v, want ErrLocked", err)
	}
}

func TestPruneDropsWholeDays(t *testing.T) {
	db, _ := mustOpen(t)
	b := &Batch{Devices: []*Device{{ID: "x"}}}
	for d := int64(0); d < 10; d++ {
		b.Points = append(b.Points, Point{Device: "x", TimeMS: 100*day + d*day + 5, SpO2: 97})
		b.Chunks = append(b.Chunks, Chunk{Device: "x", Seq: uint64(d + 1), ArrivalMS: 100*day + d*day})
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	n, err := db.Prune(109*day+1, Retention{TrendDays: 3, LedgerDays: 5})
	if err != nil {
		t.Fatal(err)
	}
	// trend keeps days 106..109 (4 buckets, drops 6); ledger keeps 104..109 (drops 4).
	if n != 10 {
		t.Errorf("dropped %d buckets, want 10", n)
	}
	cnt := 0
	db.Trend("x", 0, 200*day, func(Point) bool { cnt++; return true })
	if cnt != 4 {
		t.Errorf("%d trend points left, want 4", cnt)
	}
}

func TestEpisodesAuditProfilesCalibrations(t *testing.T) {
	db, _ := mustOpen(t)
	e1 := &Episode{Device: "a", Condition: "spo2_low", OnsetMS: 10, Active: true}
	e2 := &Episode{Device: "b", Condition: "pulse_high", OnsetMS: 20}
	if err := db.Write(&Batch{Episodes: []*Episode{e1, e2}, Audit: []*AuditEntry{{Actor: "nurse-k", Action: "alarm.acknowledge", TimeMS: 5}}}); err != nil {
		t.Fatal(err)
	}
	if e1.ID == 0 || e2.ID == e1.ID {
		t.Fatal("episode ids not assigned")
	}
	e1.Active = false
	e1.EndedMS = 30
	if err := db.Write(&Batch{Episodes: []*Episode{e1}}); err != nil {
		t.Fatal(err)
	}
	all, _ := db.Episodes(EpisodeFilter{})
	if len(all) != 2 || all[0].ID != e2.ID {
		t.Errorf("episodes newest first: %+v", all)
	}
	act, _ := db.Episodes(EpisodeFilter{ActiveOnly: true})
	if len(act) != 0 {
		t.Errorf("updated episode still active: %+v", act)
	}
	if err := db.AppendAudit(&AuditEntry{Actor: "admin", Action: "profile.set", TimeMS: 6}); err != nil {
		t.Fatal(err)
	}
	au, _ := db.Audit(0, "alarm.", 0)
	if len(au) != 1 || au[0].Actor != "nurse-k" {
		t.Errorf("audit filter: %+v", au)
	}
	if err := db.SetProfile("", []byte("name: x"), nil); err != nil {
		t.Fatal(err)
	}
	pr, _ := db.Profiles()
	if string(pr[""]) != "name: x" {
		t.Errorf("default profile: %q", pr[""])
	}
	c1, _ := db.PutCalibration(Calibration{Name: "proto-b", CurveYAML: "a"}, nil)
	c2, _ := db.PutCalibration(Calibration{Name: "proto-b", CurveYAML: "b"}, nil)
	if c1.Version != 1 || c2.Version != 2 {
		t.Errorf("versions %d %d", c1.Version, c2.Version)
	}
	latest, err := db.GetCalibration("proto-b", 0)
	if err != nil || latest.CurveYAML != "b" {
		t.Errorf("latest: %+v %v", latest, err)
	}
	if _, err := db.GetCalibration("nope", 0); !errors.Is(err, ErrNotFound) {
		t.Errorf("missing calibration: %v", err)
	}
}

func TestRawCaptureRoundTrip(t *testing.T) {
	db, _ := mustOpen(t)
	r := RawCapture{Device: "a", Seq: 3, DeviceTimeMS: 1234, RateHz: 100, Red: []uint32{1, 2, 3}, IR: []uint32{4, 5, 6}}
	if err := db.Write(&Batch{Raw: []RawCapture{r}}); err != nil {
		t.Fatal(err)
	}
	var got []RawCapture
	db.RawCaptures("a", 0, 10_000, func(c RawCapture) bool { got = append(got, c); return true })
	if len(got) != 1 || got[0].Seq != 3 || got[0].IR[2] != 6 || got[0].RateHz != 100 || len(got[0].Ambient) != 0 {
		t.Errorf("raw: %+v", got)
	}
}

// A session that started long before the window but ran into it is found;
// one that ended before the window is not.
func TestSessionsSince(t *testing.T) {
	db, _ := mustOpen(t)
	b := &Batch{Sessions: []Session{
		{Device: "x", StartMS: 1_000, EndMS: 2_000},
		{Device: "x", StartMS: 3_000, EndMS: 50_000}, // started before 10_000, ended after
		{Device: "x", StartMS: 60_000},               // still open
	}}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	got, err := db.SessionsSince("x", 10_000)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 2 || got[0].StartMS != 3_000 || got[1].StartMS != 60_000 {
		t.Errorf("sessions since 10 s: %+v", got)
	}
}
