package tune

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// FuzzParseGrid: any input gives a grid or an error, never a panic; an
// accepted grid builds every point.
func FuzzParseGrid(f *testing.F) {
	for _, s := range []string{handGrid, agreeGrid, findingsGrid, averagingGrid,
		"base: adult-ward-pilot\naveraging: [2s, 30s]\nreference:\n  rule: {below: 85, for: 60s}\n",
		"base: adult-ward-pilot\nsweep:\n  spo2_low.limit: [84]\n  spo2_low.escalate.below: [80]\nreference:\n  rule: {below: 85, for: 60s}\n",
		"base: [1]\nsweep: {}\n", "reference:\n  rule: 3\n", "sweep:\n  a.b.c.d: [1]\n"} {
		f.Add(s)
	}
	if b, err := os.ReadFile(filepath.Join("testdata", "hand-grid.yaml")); err == nil {
		f.Add(string(b))
	}
	f.Fuzz(func(t *testing.T, s string) {
		g, err := ParseGrid([]byte(s), "testdata")
		if err != nil {
			return
		}
		pts, err := g.Points()
		if err != nil || len(pts) != g.Size() {
			t.Fatalf("accepted grid: %d points, size %d, err %v", len(pts), g.Size(), err)
		}
		for _, p := range pts {
			if err := p.Profile.Validate(); err != nil {
				t.Fatalf("point %s invalid: %v", p.Name, err)
			}
		}
	})
}

// FuzzReadEventsCSV: no panic; accepted events have end after start.
func FuzzReadEventsCSV(f *testing.F) {
	f.Add("device,start_s,end_s,label\na,1,2,x\n")
	f.Add("device,start_s,end_s\na,1e308,Inf\n")
	f.Add("device,start_s,end_s\n\"a\nb\",1,2\n")
	f.Fuzz(func(t *testing.T, s string) {
		ev, err := ReadEventsCSV(strings.NewReader(s))
		if err != nil {
			return
		}
		for _, e := range ev {
			if !(e.End > e.Start) {
				t.Fatalf("accepted %+v", e)
			}
		}
	})
}
