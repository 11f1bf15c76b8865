package main

import (
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// An episode stored on two gateways (a device that moved during it: the
// same device, condition and onset) is listed once, from the copy holding
// most of it; other episodes, even at the same onset, stay.
func TestDuplicateEpisodesAreDroppedAndCounted(t *testing.T) {
	row := func(gw string, id uint64, dev, cond string, onset, ended, acked int64) episodeRow {
		return episodeRow{Gateway: gw, Episode: &pb.Episode{EpisodeId: id, DeviceId: dev, Condition: cond, OnsetUnixMs: onset,
			AnnouncedUnixMs: onset + 15_000, EndedUnixMs: ended, AcknowledgedUnixMs: acked}}
	}
	rows := []episodeRow{
		row("a", 7, "d1", "spo2_low", 1000, 0, 0),           // the old gateway's copy, open when the device left
		row("b", 2, "d1", "spo2_low", 1000, 90_000, 0),      // the survivor's, ended: kept
		row("a", 8, "d1", "desaturation", 1000, 0, 0),       // another condition: kept
		row("a", 9, "d2", "spo2_low", 1000, 0, 0),           // another device: kept
		row("b", 3, "d3", "spo2_low", 5000, 60_000, 0),      // ended on both, acknowledged on one
		row("a", 4, "d3", "spo2_low", 5000, 60_000, 30_000), // kept
	}
	out, dups := dropDuplicateEpisodes(rows)
	if dups != 2 || len(out) != 4 {
		t.Fatalf("%d rows, %d dropped; want 4 and 2", len(out), dups)
	}
	// The old gateway's copy still says active: the listing says so.
	rows[0].Episode.Active = true
	if w := activeElsewhere(rows, out); len(w) != 1 || !strings.Contains(w[0], "listed from b (episode 2, not active), but a holds it as active (episode 7)") {
		t.Errorf("warnings %q, want one naming a's active copy", w)
	}
	got := map[string]string{}
	for _, r := range out {
		got[r.Episode.GetDeviceId()+"/"+r.Episode.GetCondition()] = r.Gateway
	}
	want := map[string]string{"d1/spo2_low": "b", "d1/desaturation": "a", "d2/spo2_low": "a", "d3/spo2_low": "a"}
	for k, v := range want {
		if got[k] != v {
			t.Errorf("%s kept from %q, want %q", k, got[k], v)
		}
	}
}

// A copy on the gateway a device moved away from loses to the copy where
// the episode goes on, even when only the old copy was acknowledged: the
// merged list shows the episode active, as it is.
func TestMovedAwayEpisodeCopyLosesToTheOngoingOne(t *testing.T) {
	old := &pb.Episode{EpisodeId: 7, DeviceId: "d1", Condition: "spo2_low", OnsetUnixMs: 1000, AnnouncedUnixMs: 16_000,
		AcknowledgedUnixMs: 20_000, MovedToGateway: "b"}
	cur := &pb.Episode{EpisodeId: 2, DeviceId: "d1", Condition: "spo2_low", OnsetUnixMs: 1000, AnnouncedUnixMs: 16_000, Active: true}
	for _, rows := range [][]episodeRow{{{Gateway: "a", Episode: old}, {Gateway: "b", Episode: cur}}, {{Gateway: "b", Episode: cur}, {Gateway: "a", Episode: old}}} {
		out, dups := dropDuplicateEpisodes(rows)
		if dups != 1 || len(out) != 1 || out[0].Gateway != "b" || !out[0].Episode.GetActive() {
			t.Errorf("kept %+v (%d dropped); want b's active copy", out, dups)
		}
	}
}

// An audit entry in two logs alike in every field is listed once.
func TestDuplicateAuditEntriesAreDroppedAndCounted(t *testing.T) {
	e := func(tm int64, action string) *pb.AuditEntry {
		return &pb.AuditEntry{TimeUnixMs: tm, Actor: "alice", Action: action, DeviceId: "d1", Remote: "10.0.0.9"}
	}
	out, dups := dropDuplicateAudit([]gatewayAudit{{"a", e(2, "profile.set")}, {"b", e(2, "profile.set")}, {"b", e(2, "alarm.acknowledged")}, {"a", e(1, "profile.set")}})
	if dups != 1 || len(out) != 3 || out[0].Gateway != "a" {
		t.Errorf("%+v, %d dropped; want 3 entries, 1 dropped, the first kept", out, dups)
	}
}

// The messages no reachable gateway holds are the holes below the highest
// held one, with the device times around each; a device held whole is not
// named.
func TestMissingSequences(t *testing.T) {
	got := missingSequences(map[string][]store.SeqSpan{
		"moved": {{First: 42, Last: 82, FirstDevMS: 42_000, LastDevMS: 82_000}},
		"holed": {{First: 50, Last: 60, FirstDevMS: 50_000, LastDevMS: 60_000}, {First: 1, Last: 10, FirstDevMS: 1000, LastDevMS: 10_000}},
		"whole": {{First: 1, Last: 5}, {First: 6, Last: 9}},
	})
	if len(got) != 2 || got[0].Device != "holed" || got[1].Device != "moved" {
		t.Fatalf("%+v, want holed and moved", got)
	}
	if m := got[0].Missing; len(m) != 1 || m[0] != (seqGap{11, 49, 10_000, 50_000}) {
		t.Errorf("holed: %+v, want 11-49 between 10 s and 50 s", m)
	}
	if m := got[1].Missing; len(m) != 1 || m[0] != (seqGap{1, 41, 0, 42_000}) {
		t.Errorf("moved: %+v, want 1-41 before 42 s", m)
	}
	if s := got[1].text(); s != "messages 1-41 before device time 1970-01-01T00:00:42Z" {
		t.Errorf("text %q", s)
	}
}
