package store

import (
	"encoding/binary"
	"math"
	"math/rand/v2"
	"testing"
)

// Points written out of order, in several batches and compactions, across
// a day boundary, with missing values, values beyond the fixed-point range
// and changing flags, come back in time order, each once, at the stated
// resolution; keep-first still refuses a time held inside a block.
func TestTrendBlocksRoundTripOutOfOrder(t *testing.T) {
	db, _ := mustOpen(t)
	rng := rand.New(rand.NewPCG(7, 8))
	start := 50*day - 600_000
	const n = 1500
	want := map[int64]Point{}
	order := rng.Perm(n)
	for len(order) > 0 {
		k := min(len(order), 1+rng.IntN(200))
		b := &Batch{}
		for _, i := range order[:k] {
			p := Point{Device: "blk", TimeMS: start + int64(i)*1000 + int64(i%3), Source: uint8(1 + i%2), Flags: uint16(i / 500),
				SpO2: 80 + rng.Float64()*20, Pulse: 40 + rng.Float64()*160, PI: rng.Float64() * 20, SQI: rng.Float64(), Ratio: 0.3 + rng.Float64()*2}
			switch i % 97 {
			case 0:
				p.SpO2, p.Ratio = math.NaN(), math.NaN()
			case 1:
				p.Pulse, p.PI, p.Ratio = 400.5, 45.25, 3.5 // beyond int16 fixed point
			case 2:
				p.SQI = math.Inf(1)
			}
			want[p.TimeMS] = p
			b.Points = append(b.Points, p)
		}
		order = order[k:]
		if err := db.Write(b); err != nil {
			t.Fatal(err)
		}
		if err := db.CompactAll(); err != nil {
			t.Fatal(err)
		}
	}
	var got []Point
	if err := db.Trend("blk", 0, 1<<62, func(p Point) bool { got = append(got, p); return true }); err != nil {
		t.Fatal(err)
	}
	if len(got) != n {
		t.Fatalf("%d points, want %d", len(got), n)
	}
	res := [5]float64{0.005, 0.005, 0.0005, 0.0005, 0.00005} // half the resolution
	for i, g := range got {
		if i > 0 && g.TimeMS <= got[i-1].TimeMS {
			t.Fatalf("point %d at %d after %d", i, g.TimeMS, got[i-1].TimeMS)
		}
		w := want[g.TimeMS]
		gv, wv := pointValues(&g), pointValues(&w)
		for f := range gv {
			tol := res[f] + math.Abs(wv[f])*1e-7 // plus float32 rounding
			if !(sameFloat(gv[f], wv[f], tol) || (math.IsInf(wv[f], 1) && math.IsInf(gv[f], 1))) {
				t.Fatalf("point at %d, value %d: got %v, want %v", g.TimeMS, f, gv[f], wv[f])
			}
		}
		if g.Flags != w.Flags || g.Source != w.Source || g.Device != "blk" {
			t.Fatalf("point at %d: %+v, want %+v", g.TimeMS, g, w)
		}
	}
	// A range read from the middle of a block.
	var mid []Point
	from := start + 700*1000
	if err := db.Trend("blk", from, from+10_000, func(p Point) bool { mid = append(mid, p); return true }); err != nil {
		t.Fatal(err)
	}
	if len(mid) != 10 || mid[0].TimeMS != from+700%3 {
		t.Fatalf("10 s from the middle: %d points, first at %d", len(mid), mid[0].TimeMS-start)
	}
	// Keep the first: a time inside a compacted block is refused.
	b := &Batch{Points: []Point{{Device: "blk", TimeMS: start + 700*1000 + 1, SpO2: 50}, {Device: "blk", TimeMS: start + 700*1000 + 500, SpO2: 50}}}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if b.KeptOut != 1 || len(b.Points) != 1 {
		t.Fatalf("kept out %d of 2 (one is stored), want 1", b.KeptOut)
	}
	st, _ := db.Stats()
	if st.TrendPoints != n+1 || st.Kind("trend").Records > n/blockMax+12 {
		t.Errorf("stats: %d points in %d records", st.TrendPoints, st.Kind("trend").Records)
	}
}

// A block that does not decode is reported, not read as points.
func TestTrendBlockDecodeRefusesDamage(t *testing.T) {
	pts := []Point{{TimeMS: 1000, SpO2: 97}, {TimeMS: 2000, SpO2: 96}, {TimeMS: 3001, SpO2: math.NaN()}}
	k := make([]byte, 8)
	putKey(k, 1000)
	v := encodeBlock(pts)
	if got, err := decodeBlock(k, v, nil); err != nil || len(got) != 3 || got[2].TimeMS != 3001 || !math.IsNaN(got[2].SpO2) {
		t.Fatalf("round trip: %+v, %v", got, err)
	}
	for cut := 1; cut < len(v); cut++ {
		if _, err := decodeBlock(k, v[:cut], nil); err == nil {
			t.Fatalf("a block cut to %d of %d bytes decoded", cut, len(v))
		}
	}
	bad := append(binary.AppendUvarint([]byte{vTrendBlock}, blockMax+1), v[2:]...)
	if _, err := decodeBlock(k, bad, nil); err == nil {
		t.Fatal("a block claiming too many points decoded")
	}
}
