package store

import (
	"bufio"
	"errors"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"strconv"
	"strings"
	"testing"

	bolt "go.etcd.io/bbolt"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// rawChunks makes n consecutive 25-sample chunks of 100 Hz 16-bit PPG from
// the physical model, starting at sequence seq0 and device time t0.
func rawChunks(dev string, seed uint64, seq0 uint64, t0 int64, n int, ambient bool) []RawCapture {
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: 100, ADCBits: 16, Seed: seed})
	red, ir, amb := make([]float64, 25), make([]float64, 25), make([]float64, 25)
	vit := ppgmodel.DefaultVitals()
	vit.AmbientPct = 2
	var out []RawCapture
	for i := 0; i < n; i++ {
		src.Fill(red, ir, amb, vit)
		r := RawCapture{Device: dev, Seq: seq0 + uint64(i), DeviceTimeMS: t0 + int64(i)*250 + int64(i%3), RateHz: 100,
			Red: make([]uint32, 25), IR: make([]uint32, 25)}
		for j := range red {
			r.Red[j], r.IR[j] = uint32(red[j]), uint32(ir[j])
		}
		if ambient {
			r.Ambient = make([]uint32, 25)
			for j := range amb {
				r.Ambient[j] = uint32(amb[j] * 65535 / 100)
			}
		}
		out = append(out, r)
	}
	return out
}

func readRaw(t *testing.T, db *DB, dev string) []RawCapture {
	t.Helper()
	var got []RawCapture
	if err := db.RawCaptures(dev, 0, 1<<62, func(r RawCapture) bool { got = append(got, r); return true }); err != nil {
		t.Fatal(err)
	}
	return got
}

// Raw captures written a chunk per batch (as the gateway does), with a
// gap, a rate change, an ambient channel, a failed write and a reopen in
// between, come back sample for sample, and blocks hold up to 10 s.
func TestRawBlocksRoundTrip(t *testing.T) {
	dir := t.TempDir()
	db, err := Open(dir, Options{})
	if err != nil {
		t.Fatal(err)
	}
	t0 := 60 * day
	want := rawChunks("r1", 1, 1, t0, 120, false)                        // 30 s
	want = append(want, rawChunks("r1", 2, 122, t0+31_000, 20, true)...) // a gap, then ambient
	extreme := RawCapture{Device: "r1", Seq: 142, DeviceTimeMS: t0 + 36_000, RateHz: 50,
		Red: []uint32{0, math.MaxUint32, 0, math.MaxUint32, 7}, IR: []uint32{math.MaxUint32, 0, 1, 2, 3}}
	want = append(want, extreme)
	for i, r := range want {
		if i == 60 {
			db.InjectWriteFault(func(*Batch) error { return errors.New("injected") })
			if err := db.Write(&Batch{Raw: []RawCapture{r}}); err == nil {
				t.Fatal("injected fault: write succeeded")
			}
			db.InjectWriteFault(nil)
		}
		if i == 90 {
			db.Close()
			if db, err = Open(dir, Options{}); err != nil {
				t.Fatal(err)
			}
		}
		if err := db.Write(&Batch{Raw: []RawCapture{r}}); err != nil {
			t.Fatal(err)
		}
	}
	defer db.Close()
	got := readRaw(t, db, "r1")
	if len(got) != len(want) {
		t.Fatalf("%d chunks, want %d", len(got), len(want))
	}
	for i := range want {
		w := want[i]
		if len(w.Ambient) == 0 {
			w.Ambient = nil
		}
		g := got[i]
		if len(g.Ambient) == 0 {
			g.Ambient = nil
		}
		if !reflect.DeepEqual(g, w) {
			t.Fatalf("chunk %d: got seq %d t %d rate %v, want seq %d t %d rate %v (samples equal: %v)", i, g.Seq, g.DeviceTimeMS, g.RateHz,
				w.Seq, w.DeviceTimeMS, w.RateHz, reflect.DeepEqual(g.Red, w.Red) && reflect.DeepEqual(g.IR, w.IR))
		}
	}
	st, err := db.Stats()
	if err != nil {
		t.Fatal(err)
	}
	// 30 s in 10 s blocks, one more at the reopen, one after the gap,
	// one for the new rate.
	if r := st.Kind("raw"); r.Items != int64(len(want)) || r.Records < 5 || r.Records > 7 {
		t.Errorf("raw: %d records holding %d chunks, want 5-7 blocks holding %d", r.Records, r.Items, len(want))
	}
	// A time range from the middle.
	n := 0
	if err := db.RawCaptures("r1", t0+10_000, t0+12_000, func(r RawCapture) bool { n++; return true }); err != nil || n != 8 {
		t.Errorf("2 s from the middle: %d chunks, %v; want 8", n, err)
	}
	// A chunk written again is kept out when it would start a block.
	dup := want[0]
	dup.Red = make([]uint32, 25)
	if err := db.Write(&Batch{Raw: []RawCapture{dup}}); err != nil {
		t.Fatal(err)
	}
	if got := readRaw(t, db, "r1"); !reflect.DeepEqual(got[0].Red, want[0].Red) {
		t.Error("a chunk written again replaced the stored one")
	}
}

func TestRawBlockDecodeRefusesDamage(t *testing.T) {
	r := rawChunks("x", 3, 1, 0, 1, true)[0]
	var hist [3][3]int64
	v := append([]byte{vRawBlock, 0x40, 0x59, 0, 0, 0, 0, 0, 0, 1}, encodeFrame(0, 0, [][]uint32{r.Red, r.IR, r.Ambient}, &hist)...)
	k := u64(1)
	if _, err := decodeRawBlock(k, v, func(RawCapture) bool { return true }); err != nil {
		t.Fatal(err)
	}
	for cut := 1; cut < len(v); cut++ {
		if _, err := decodeRawBlock(k, v[:cut], func(RawCapture) bool { return true }); err == nil && cut < 10 {
			t.Fatalf("a block cut to %d bytes decoded", cut)
		}
	}
	bad := append([]byte(nil), v...)
	bad[len(bad)-1] ^= 0xff
	bad[len(bad)-3] ^= 0x5a
	_, err := decodeRawBlock(k, bad, func(g RawCapture) bool {
		if reflect.DeepEqual(g.Red, r.Red) && reflect.DeepEqual(g.IR, r.IR) && reflect.DeepEqual(g.Ambient, r.Ambient) {
			t.Error("flipped bits decoded to the same samples")
		}
		return true
	})
	_ = err // flipped payload bits either fail to decode or change samples
}

// cameraCodes reads a camera recording (testdata/camera-oximetry: frame
// means on a 0-255 scale with 4 decimals) as integer codes: mean x 10^4,
// the resolution the file carries.
func cameraCodes(tb testing.TB, path string) (red, ir []uint32) {
	f, err := os.Open(path)
	if err != nil {
		tb.Fatal(err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	sc.Scan() // header t_s,r,g,b
	for sc.Scan() {
		c := strings.Split(sc.Text(), ",")
		if len(c) != 4 {
			tb.Fatalf("%s: %q", path, sc.Text())
		}
		r, err1 := strconv.ParseFloat(c[1], 64)
		g, err2 := strconv.ParseFloat(c[2], 64)
		if err1 != nil || err2 != nil {
			tb.Fatalf("%s: %q", path, sc.Text())
		}
		red, ir = append(red, uint32(math.Round(r*1e4))), append(ir, uint32(math.Round(g*1e4)))
	}
	return red, ir
}

// BenchmarkRawCamera reports the raw capture's bytes per device-second on
// the real, noisy camera recordings (red = r, second channel = g, 30 Hz in
// chunks of 8 frames), written a chunk per batch.
//
//	go test ./internal/store -run x -bench RawCamera -benchtime 1x
func BenchmarkRawCamera(b *testing.B) {
	paths, _ := filepath.Glob(filepath.Join("..", "..", "testdata", "camera-oximetry", "subject-*", "ppg_left.csv"))
	if len(paths) == 0 {
		b.Fatal("no camera recordings")
	}
	var st *Stats
	samples := 0
	for i := 0; i < b.N; i++ {
		db, _ := mustOpen(b)
		samples = 0
		for d, p := range paths {
			red, ir := cameraCodes(b, p)
			dev := "camera-" + strconv.Itoa(d+1)
			batch := &Batch{}
			for j, seq := 0, uint64(1); j+8 <= len(red); j, seq = j+8, seq+1 {
				batch.Raw = append(batch.Raw[:0], RawCapture{Device: dev, Seq: seq, DeviceTimeMS: 70*day + int64(j)*1000/30, RateHz: 30,
					Red: red[j : j+8], IR: ir[j : j+8]})
				if err := db.Write(batch); err != nil {
					b.Fatal(err)
				}
				samples += 16
			}
		}
		var err error
		if st, err = db.Stats(); err != nil {
			b.Fatal(err)
		}
	}
	raw := st.Kind("raw")
	b.ReportMetric(float64(raw.Bytes)/st.RawSeconds, "raw_B/devsec")
	b.ReportMetric(8*float64(raw.InUse)/float64(samples), "bits/sample")
}

// Deleting an interval (a participant's withdrawal) out of the middle of
// raw blocks keeps every chunk outside it, sample for sample.
func TestRawBlockDeleteInterval(t *testing.T) {
	db, _ := mustOpen(t)
	t0 := 80 * day
	want := rawChunks("w", 5, 1, t0, 80, true) // 20 s: two blocks
	for _, r := range want {
		if err := db.Write(&Batch{Raw: []RawCapture{r}}); err != nil {
			t.Fatal(err)
		}
	}
	from, to := t0+7_000, t0+13_000
	var n uint64
	db.writeMu.Lock()
	err := db.update(func(tx *bolt.Tx) error {
		var err error
		n, err = db.deleteRaw(tx, "w", from, to)
		return err
	})
	db.writeMu.Unlock()
	if err != nil {
		t.Fatal(err)
	}
	var kept []RawCapture
	for _, r := range want {
		if r.DeviceTimeMS < from || r.DeviceTimeMS >= to {
			kept = append(kept, r)
		}
	}
	if n != uint64(len(want)-len(kept)) {
		t.Errorf("deleted %d chunks, want %d", n, len(want)-len(kept))
	}
	got := readRaw(t, db, "w")
	if !reflect.DeepEqual(got, kept) {
		t.Fatalf("after deleting [7 s, 13 s): %d chunks, want %d (or samples differ)", len(got), len(kept))
	}
	// The device writes on after the deletion.
	next := rawChunks("w", 6, 81, t0+20_000, 4, true)
	for _, r := range next {
		if err := db.Write(&Batch{Raw: []RawCapture{r}}); err != nil {
			t.Fatal(err)
		}
	}
	if got := readRaw(t, db, "w"); !reflect.DeepEqual(got, append(kept, next...)) {
		t.Fatal("chunks written after the deletion do not read back")
	}
}
