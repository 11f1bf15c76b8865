package main

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// tuneMixedCSV is an invented 1 Hz trend (demo data) of 2 MB, written the
// two ways trend files come: first device after device (five devices,
// each in one run of rows), then the devices interleaved in time order
// (three of those continuing, three more, and one more, low, for 200 s), in a
// random order at each second; a few cells are empty. The reader reads it in parallel blocks,
// keeping a device's rows in place when they are one run of one block and
// copying them otherwise, so both ways are exercised.
func tuneMixedCSV(seed uint64) []byte {
	r := rand.New(rand.NewPCG(seed, 21))
	var b bytes.Buffer
	b.WriteString("t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi\n")
	type dev struct {
		dip   int
		depth float64
	}
	devs := make([]dev, 9)
	row := func(d, t int) {
		v := &devs[d]
		if v.dip == 0 && r.IntN(400) == 0 {
			v.dip, v.depth = 5+r.IntN(150), 3+12*r.Float64()
		}
		x := 95.5 + 0.7*r.NormFloat64()
		if v.dip > 0 {
			x -= v.depth
			v.dip--
		}
		if d == 8 {
			x -= 10 // low all along: alarms in every profile
		}
		cell := strconv.FormatFloat(math.Round(math.Min(100, x)*10)/10, 'g', -1, 64)
		if r.IntN(150) == 0 {
			cell = ""
		}
		fmt.Fprintf(&b, "%d,dev-%d,%s,%d,%.2f,0.9\n", t, d, cell, 60+r.IntN(20), r.Float64()*3)
	}
	const split = 20000 // the first 20,000 s device after device
	for d := range 3 {
		for t := range split {
			row(d, t)
		}
	}
	for d := 6; d < 8; d++ { // 2,000 rows each, likely in one block
		for t := range 2000 {
			row(d, t)
		}
	}
	for t := split; t < split+12000; t++ {
		perm := r.Perm(6)
		if t >= 22000 && t < 22200 { // dev-8 interleaved, likely in one block
			perm = append(perm, 8)
			r.Shuffle(len(perm), func(i, j int) { perm[i], perm[j] = perm[j], perm[i] })
		}
		for _, d := range perm {
			row(d, t)
		}
	}
	return b.Bytes()
}

// The CSV reader parses blocks of lines in parallel and assembles each
// device's rows from them; tune must not see the difference. The same
// trend file is tuned as it is (parallel blocks) and with its first row's
// device quoted, which sends the whole file through the line-by-line
// encoding/csv path: summary.csv must be the same byte for byte.
func TestTuneCSVParallelReadAgreesWithSerial(t *testing.T) {
	data := tuneMixedCSV(3)
	first := bytes.IndexByte(data, '\n') + 1
	quoted := bytes.Replace(data[first:], []byte(",dev-0,"), []byte(",\"dev-0\","), 1)
	if bytes.Equal(quoted, data[first:]) || len(data) < 1<<20 {
		t.Fatalf("the file does not exercise the check (%d bytes, first row %q)", len(data), data[first:first+30])
	}
	serial := append(append([]byte(nil), data[:first]...), quoted...)
	dir := t.TempDir()
	grid := writeFile(t, dir, "grid.yaml", `
base:
  name: mixed
  conditions:
    - {kind: spo2_low, limit: 90, hysteresis: 1, delay: 15s, priority: medium, escalate: {below: 82, priority: high}}
sweep:
  spo2_low.limit: [88, 90, 92, 94]
  spo2_low.delay: [0s, 10s, 30s]
  spo2_low.hysteresis: [0, 1]
reference:
  rule: {below: 85, for: 30s}
`)
	summary := func(name string, b []byte) []byte {
		t.Helper()
		in := filepath.Join(dir, name+".csv")
		if err := os.WriteFile(in, b, 0o644); err != nil {
			t.Fatal(err)
		}
		out := filepath.Join(dir, "out-"+name)
		code, stdout, stderr := replayRun(t, "", "tune", "--grid", grid, "--in", in, "--out", out)
		if code != 0 {
			t.Fatalf("%s: exit %d: %s", name, code, stderr)
		}
		// 3 devices x 31,999 s, 3 x 11,999 s, 2 x 1,999 s and 199 s.
		if !strings.Contains(stdout, "24 profiles over 9 devices, 37.8 monitored hours") {
			t.Errorf("%s: stdout %q, want 24 profiles over 9 devices, 37.8 monitored hours", name, stdout)
		}
		s, err := os.ReadFile(filepath.Join(out, "summary.csv"))
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	par, ser := summary("parallel", data), summary("serial", serial)
	if !bytes.Equal(par, ser) {
		t.Fatalf("summary.csv differs:\nparallel blocks:\n%s\nline by line:\n%s", par, ser)
	}
	// Episodes in every row (the check compares something).
	for _, rec := range readCSV(t, filepath.Join(dir, "out-parallel", "summary.csv"))[1:] {
		if rec[4] == "0" {
			t.Fatalf("profile %s has no episodes: the trend does not exercise the check", rec[0])
		}
	}
}
