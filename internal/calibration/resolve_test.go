package calibration

import (
	"errors"
	"math"
	"strings"
	"testing"
)

func TestResolveReferences(t *testing.T) {
	stored := map[uint32]string{
		1: "name: proto-d\nversion: 1\nmodel: linear\ncoefficients: [110, -25]\nratio_min: 0.2\nratio_max: 2\n",
		2: "name: proto-d\nversion: 2\nmodel: linear\ncoefficients: [100, -25]\nratio_min: 0.2\nratio_max: 2\n",
	}
	lookup := func(name string, v uint32) (string, uint32, error) {
		if name != "proto-d" {
			return "", 0, errors.New("no such curve")
		}
		if v == 0 {
			v = 2
		}
		y, ok := stored[v]
		if !ok {
			return "", 0, errors.New("no such version")
		}
		return y, v, nil
	}
	cases := []struct {
		ref     string
		r       float64
		applied string
		want    float64
	}{
		// Empirical line SpO2 = 110 - 25 R: R 0.5 -> 97.5 (docs/references.md, common practice).
		{"", 0.5, "empirical", 97.5},
		{"empirical", 1.0, "empirical", 85},
		// Two-wavelength model at 660/940 nm: S(R=0.5) = 90.93 % (docs/references.md, computed from Prahl's table, seen).
		{"beer-lambert", 0.5, "beer-lambert@660/940nm", 90.93},
		{"beer-lambert@660/940nm", 1.0, "beer-lambert@660/940nm", 73.91},
		{"proto-d", 0.5, "proto-d@v2", 87.5},
		{"proto-d@v1", 0.5, "proto-d@v1", 97.5},
	}
	for _, c := range cases {
		cal, applied, err := Resolve(c.ref, 660, 940, lookup)
		if err != nil {
			t.Errorf("%q: %v", c.ref, err)
			continue
		}
		got, ok := cal.SpO2(c.r)
		if applied != c.applied || !ok || math.Abs(got-c.want) > 0.01 {
			t.Errorf("%q at R=%v: %v (%s), want %v (%s)", c.ref, c.r, got, applied, c.want, c.applied)
		}
	}
	for _, bad := range []struct{ ref, want string }{
		{"proto-d@v0", "after @v"},
		{"proto-d@vx", "after @v"},
		{"beer-lambert@660nm", "beer-lambert@RED/IRnm"},
		{"beer-lambert@300/940nm", "beer-lambert@300/940nm"},
		{"proto-e", "no such curve"},
	} {
		if _, _, err := Resolve(bad.ref, 660, 940, lookup); err == nil || !strings.Contains(err.Error(), bad.want) {
			t.Errorf("%q: %v, want an error mentioning %q", bad.ref, err, bad.want)
		}
	}
	if _, _, err := Resolve("proto-d", 660, 940, nil); !errors.Is(err, ErrNotStored) {
		t.Errorf("no store: %v", err)
	}
}
