package notify

import (
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

func TestLabelName(t *testing.T) {
	for in, want := range map[string]string{
		"ward": "ward", "bed.no": "bed_no", "3rd-floor": "_3rd_floor", "__name__": "label__name__",
		"Zimmer Nr": "Zimmer_Nr", "ü": "label__", "": "",
	} {
		if got := LabelName(in); got != want {
			t.Errorf("LabelName(%q) = %q, want %q", in, got, want)
		}
	}
}

// An escalated episode is one alert at its current priority plus resolved
// ones at the lower priorities (priority is a label, so the alert sent
// before the escalation is another alert and must not stay firing).
func TestBuildEscalatedEpisode(t *testing.T) {
	e := &store.Episode{ID: 7, Device: "d", Condition: "spo2_low", Priority: "high", OnsetMS: 1000, AnnouncedMS: 16000,
		EscalatedMS: 76000, MinSpO2: 80, Active: true}
	as := Build(e, nil, "gw", "", time.UnixMilli(90000))
	if len(as) != 3 {
		t.Fatalf("got %d alerts, want 3: %+v", len(as), as)
	}
	if as[0].Labels["priority"] != "high" || as[0].EndsAt != "" {
		t.Errorf("current alert %+v: want high, firing (no endsAt)", as[0])
	}
	for i, p := range []string{"low", "medium"} {
		a := as[i+1]
		if a.Labels["priority"] != p || a.EndsAt != "1970-01-01T00:01:16Z" || a.StartsAt != "1970-01-01T00:00:16Z" {
			t.Errorf("lower priority alert %+v: want %s resolved at the escalation", a, p)
		}
	}
	if _, ok := as[0].Annotations["device_page"]; ok {
		t.Error("a device page link without a page base")
	}
}

// A latched episode whose signal was acknowledged after the condition
// cleared resolves at the acknowledgement; an inactive episode without
// times resolves now, never before it started.
func TestBuildResolvedEnds(t *testing.T) {
	latched := &store.Episode{ID: 1, Device: "d", Condition: "spo2_low", Priority: "medium", OnsetMS: 1000, AnnouncedMS: 2000,
		EndedMS: 5000, AckedMS: 9000, AckedBy: "nurse-a"}
	if a := Build(latched, nil, "", "", time.UnixMilli(99000))[0]; a.EndsAt != "1970-01-01T00:00:09Z" || a.Annotations["acknowledged_by"] != "nurse-a" {
		t.Errorf("latched and acknowledged: %+v", a)
	}
	released := &store.Episode{ID: 2, Device: "d", Condition: "c", Priority: "low", OnsetMS: 1000, AnnouncedMS: 2000}
	if a := Build(released, nil, "", "", time.UnixMilli(3000))[0]; a.EndsAt != "1970-01-01T00:00:03Z" {
		t.Errorf("inactive without an end: endsAt %s, want now", a.EndsAt)
	}
}

func TestParseURL(t *testing.T) {
	if u, err := ParseURL("http://am.example:9093/"); err != nil || u != "http://am.example:9093" {
		t.Errorf("ParseURL: %q %v", u, err)
	}
	for _, bad := range []string{"am:9093", "ftp://am", "http://user:pw@am:9093", "http://am:9093?x=1", "http://"} {
		if _, err := ParseURL(bad); err == nil {
			t.Errorf("ParseURL(%q) accepted", bad)
		}
	}
}
