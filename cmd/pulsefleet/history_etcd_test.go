package main

import (
	"context"
	"encoding/json"
	"strings"
	"testing"
	"time"
)

// A fleet on a real etcd, two `serve` processes: a device's spo2_low
// episode starts on its gateway, which is then killed; the survivor takes
// the device and the episode (alarm state travels through etcd) and ends
// it. With the killed gateway down the merged listing has the survivor's
// part, exits 3 and names the device (the survivor's ledger starts at its
// 41st message). With the gateway back, both stores hold the episode (the
// same device, condition and onset): the merged listing shows it once, from
// the survivor (ended), and counts the copy it dropped.
func TestMergedEpisodesAcrossAFailoverOnEtcd(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	f := newEtcdFleet(t, 2)
	defer f.stopAll()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	const id = "hist-0001"
	d, owner := openOwned(t, ctx, f.addrs[0], id, 10*time.Second)
	first := -1
	for i, a := range f.addrs {
		if a == owner {
			first = i
		}
	}
	t0 := time.Now().Add(-120 * time.Second).Truncate(time.Second).UnixMilli()
	for i := int64(0); i < 40; i++ { // 40 s at SpO2 80: spo2_low announced after 15 s
		d.send(uint64(i+1), t0+i*1000, 80)
	}
	for d.acked < 40 {
		d.recv()
	}
	// The alarm snapshot's publication to etcd is one round trip after the
	// transition; wait until it has surely happened.
	time.Sleep(time.Second)
	f.kill(first)
	other := 1 - first
	d2, _ := openOwned(t, ctx, f.addrs[other], id, 30*time.Second)
	for i := int64(40); i < 100; i++ { // 20 s more below, then 40 s at 97: the episode ends
		v := 80.0
		if i >= 60 {
			v = 97
		}
		d2.send(uint64(i+1), t0+i*1000, v)
	}
	for d2.acked < 100 {
		d2.recv()
	}
	list := strings.Join(f.addrs, ",")
	code, out, errOut := runCmd("episodes", "--gateway", list, "--device", id, "--format", "json")
	var doc historyDoc
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatal(err)
	}
	if code != exitIncomplete || doc.Gaps == nil || len(doc.Gaps.Devices) != 1 || doc.Gaps.Devices[0].Device != id ||
		doc.Gaps.Devices[0].Missing[0] != (seqGap{FirstSequence: 1, LastSequence: 40, BeforeUnixMs: t0 + 40_000}) {
		t.Fatalf("with the killed gateway down: exit %d, gaps %+v; want %d and %s's messages 1-40 named\n%s", code, doc.Gaps, exitIncomplete, id, errOut)
	}
	f.start(t, first)
	f.waitMembers(2, 30*time.Second)
	code, out, errOut = runCmd("episodes", "--gateway", list, "--device", id, "--format", "json")
	doc = historyDoc{}
	if err := json.Unmarshal([]byte(out), &doc); err != nil || code != 0 || doc.Incomplete {
		t.Fatalf("both up: exit %d, %v, incomplete %v: %s", code, err, doc.Incomplete, errOut)
	}
	var lows []string
	for _, k := range episodeKeys(t, doc.Episodes) {
		if strings.Contains(k, "|spo2_low|") {
			lows = append(lows, k)
		}
	}
	if len(lows) != 1 || !strings.HasPrefix(lows[0], f.addrs[other]+"|") || doc.Duplicates < 1 {
		t.Errorf("both up: spo2_low episodes %v, %d duplicates dropped; want one, the survivor's (%s), and its copy dropped\n%s",
			lows, doc.Duplicates, f.addrs[other], errOut)
	}
	for _, e := range doc.Episodes {
		var it struct {
			Episode struct {
				Condition string `json:"condition"`
				Ended     string `json:"ended_unix_ms"`
				Onset     string `json:"onset_unix_ms"`
			} `json:"episode"`
		}
		json.Unmarshal(e, &it)
		if it.Episode.Condition == "spo2_low" && (it.Episode.Ended == "" || it.Episode.Onset != jsonInt(t0)) {
			t.Errorf("kept spo2_low copy: onset %s, ended %q; want onset %d and ended", it.Episode.Onset, it.Episode.Ended, t0)
		}
	}
	t.Logf("both up, stderr:\n%s", errOut)
	if !strings.Contains(errOut, "listed once") {
		t.Errorf("stderr does not count the dropped copy: %q", errOut)
	}
}

func jsonInt(v int64) string { b, _ := json.Marshal(v); return strings.Trim(string(b), `"`) }
