package participants

import (
	"strings"
	"testing"
	"time"
)

func ms(s string) int64 {
	t, err := time.Parse(time.RFC3339, s)
	if err != nil {
		panic(err)
	}
	return t.UnixMilli()
}

func TestCheckID(t *testing.T) {
	for _, ok := range []string{"P-0042", "SITE1_017", "A1", "P0000000000000000000000000000001"} {
		if err := CheckID("participant", ok); err != nil {
			t.Errorf("%q refused: %v", ok, err)
		}
	}
	for _, c := range []struct{ pid, want string }{
		{"", "length 0, want 2..32"},
		{"P", "length 1, want 2..32"},
		{"P00000000000000000000000000000001", "length 33, want 2..32"},
		{"MARIA", "no digit"},        // a plain name
		{"Smith01", "character 'm'"}, // lower case: names are usually written so
		{"P 0042", "character ' '"},
		{"P.0042", "character '.'"},
		{"P-0042é", "character"},
	} {
		err := CheckID("participant", c.pid)
		if err == nil || !strings.Contains(err.Error(), c.want) || !strings.HasPrefix(err.Error(), "participant: ") {
			t.Errorf("%q: error %v, want it to name the field and say %q", c.pid, err, c.want)
		}
	}
}

// The ward timeline used by the tests here and in the store (all UTC):
//
//	P-0001  OX-A   2026-12-01 20:00 .. 2026-12-02 03:00  (battery fails at 03:00)
//	P-0001  OX-B   2026-12-02 03:10 .. 2026-12-02 08:00  (swap at night, 10 min without a prototype)
//	P-0001  REF-1  2026-12-01 21:00 .. 2026-12-02 07:30  (reference oximeter, at the same time)
//	P-0002  OX-A   2026-12-02 10:00 .. open              (OX-A reused for the next participant)
func timeline() []Interval {
	return []Interval{
		{"P-0001", "OX-A", ms("2026-12-01T20:00:00Z"), ms("2026-12-02T03:00:00Z")},
		{"P-0001", "OX-B", ms("2026-12-02T03:10:00Z"), ms("2026-12-02T08:00:00Z")},
		{"P-0001", "REF-1", ms("2026-12-01T21:00:00Z"), ms("2026-12-02T07:30:00Z")},
		{"P-0002", "OX-A", ms("2026-12-02T10:00:00Z"), Open},
	}
}

func TestConflict(t *testing.T) {
	tl := timeline()
	for _, iv := range tl {
		var others []Interval
		for _, o := range tl {
			if o != iv {
				others = append(others, o)
			}
		}
		if err := Conflict(others, iv); err != nil {
			t.Errorf("the timeline itself conflicts: %v", err)
		}
	}
	// OX-B again from 07:00: overlaps P-0001's OX-B until 08:00.
	err := Conflict(tl, Interval{"P-0003", "OX-B", ms("2026-12-02T07:00:00Z"), ms("2026-12-02T12:00:00Z")})
	want := "device OX-B is already enrolled to P-0001 for 2026-12-02T03:10:00Z..2026-12-02T08:00:00Z; " +
		"the requested enrolment to P-0003 for 2026-12-02T07:00:00Z..2026-12-02T12:00:00Z overlaps it"
	if err == nil || !strings.Contains(err.Error(), want) {
		t.Errorf("overlap: %v\nwant %q", err, want)
	}
	// OX-A from Dec 3: P-0002's enrolment has no end, so it overlaps.
	err = Conflict(tl, Interval{"P-0003", "OX-A", ms("2026-12-03T00:00:00Z"), Open})
	if err == nil || !strings.Contains(err.Error(), "P-0002 for 2026-12-02T10:00:00Z..open") {
		t.Errorf("open-ended overlap: %v", err)
	}
	// Touching ends do not overlap: OX-B from exactly 08:00 is free.
	if err := Conflict(tl, Interval{"P-0003", "OX-B", ms("2026-12-02T08:00:00Z"), Open}); err != nil {
		t.Errorf("back-to-back enrolment refused: %v", err)
	}
	// The same participant on another device at the same time is allowed.
	if err := Conflict(tl, Interval{"P-0001", "REF-2", ms("2026-12-01T20:00:00Z"), Open}); err != nil {
		t.Errorf("second device of one participant refused: %v", err)
	}
}

func TestStitchAndNights(t *testing.T) {
	tl := timeline()
	segs := Stitch(tl, "P-0001", ms("2026-12-01T00:00:00Z"), ms("2026-12-03T00:00:00Z"))
	want := []Segment{
		{"OX-A", ms("2026-12-01T20:00:00Z"), ms("2026-12-02T03:00:00Z")},
		{"REF-1", ms("2026-12-01T21:00:00Z"), ms("2026-12-02T07:30:00Z")},
		{"OX-B", ms("2026-12-02T03:10:00Z"), ms("2026-12-02T08:00:00Z")},
	}
	if len(segs) != len(want) {
		t.Fatalf("segments %+v, want %+v", segs, want)
	}
	for i := range want {
		if segs[i] != want[i] {
			t.Errorf("segment %d: %+v, want %+v", i, segs[i], want[i])
		}
	}
	// A window that cuts the open enrolment: P-0002 from 10:00 to the window's end.
	segs = Stitch(tl, "P-0002", ms("2026-12-02T00:00:00Z"), ms("2026-12-02T12:00:00Z"))
	if len(segs) != 1 || segs[0] != (Segment{"OX-A", ms("2026-12-02T10:00:00Z"), ms("2026-12-02T12:00:00Z")}) {
		t.Errorf("P-0002: %+v", segs)
	}
	if got := Holder(tl, "OX-A", ms("2026-12-02T02:59:59Z")); got != "P-0001" {
		t.Errorf("OX-A at 02:59:59 held by %q", got)
	}
	if got := Holder(tl, "OX-A", ms("2026-12-02T03:00:00Z")); got != "" {
		t.Errorf("OX-A at 03:00 (end, exclusive) held by %q", got)
	}

	// Night 22:00-07:00 UTC. Night "2026-12-01" runs 22:00 .. 07:00:
	//   OX-A  22:00..03:00  5 h
	//   REF-1 22:00..07:00  9 h
	//   OX-B  03:10..07:00  3 h 50 min
	// (20:00-22:00 of OX-A, 21:00-22:00 and 07:00-07:30 of REF-1, and
	// 07:00-08:00 of OX-B lie outside every night and are dropped.)
	w, err := ParseNight("22:00-07:00", time.UTC)
	if err != nil {
		t.Fatal(err)
	}
	ns := w.SplitNights(Stitch(tl, "P-0001", ms("2026-12-01T00:00:00Z"), ms("2026-12-03T00:00:00Z")))
	wantMin := map[string]int64{"OX-A": 300, "REF-1": 540, "OX-B": 230}
	if len(ns) != 3 {
		t.Fatalf("night segments %+v", ns)
	}
	for _, n := range ns {
		if n.Night.Date != "2026-12-01" || n.Night.FromMS != ms("2026-12-01T22:00:00Z") || n.Night.ToMS != ms("2026-12-02T07:00:00Z") {
			t.Errorf("night %+v", n.Night)
		}
		if got := (n.ToMS - n.FromMS) / 60_000; got != wantMin[n.Device] {
			t.Errorf("%s: %d min in the night, want %d", n.Device, got, wantMin[n.Device])
		}
	}
}

func TestNightsLocalTime(t *testing.T) {
	berlin, err := time.LoadLocation("Europe/Berlin")
	if err != nil {
		t.Skip("no time zone data:", err)
	}
	w, err := ParseNight("22:00-07:00", berlin)
	if err != nil {
		t.Fatal(err)
	}
	// Winter: Berlin is UTC+1, so night "2026-12-01" is 21:00Z .. 06:00Z.
	ns := w.Nights(ms("2026-12-01T12:00:00Z"), ms("2026-12-02T12:00:00Z"))
	if len(ns) != 1 || ns[0].Date != "2026-12-01" || ns[0].FromMS != ms("2026-12-01T21:00:00Z") || ns[0].ToMS != ms("2026-12-02T06:00:00Z") {
		t.Errorf("nights %+v", ns)
	}
	// The night of the spring change (2026-03-29, 02:00 -> 03:00 local) is one hour shorter: 8 h.
	ns = w.Nights(ms("2026-03-28T12:00:00Z"), ms("2026-03-29T12:00:00Z"))
	if len(ns) != 1 || ns[0].ToMS-ns[0].FromMS != 8*3_600_000 {
		t.Errorf("spring-forward night %+v", ns)
	}
	// A window inside one day (a nap study, 13:00-15:00) does not cross midnight.
	w2, _ := ParseNight("13:00-15:00", time.UTC)
	ns = w2.Nights(ms("2026-12-01T00:00:00Z"), ms("2026-12-03T00:00:00Z"))
	if len(ns) != 2 || ns[1].Date != "2026-12-02" || ns[1].ToMS-ns[1].FromMS != 2*3_600_000 {
		t.Errorf("day window %+v", ns)
	}
	for _, bad := range []string{"22:00", "25:00-07:00", "22:00-22:00", "22-07"} {
		if _, err := ParseNight(bad, time.UTC); err == nil || !strings.HasPrefix(err.Error(), "night: ") {
			t.Errorf("%q: %v", bad, err)
		}
	}
}
