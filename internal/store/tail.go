package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"sort"
	"sync"
	"time"

	bolt "go.etcd.io/bbolt"
	bolterrors "go.etcd.io/bbolt/errors"
)

// Trend points are written twice, cheaply:
//
//  1. at once, into the recent log recent/GEN/TIME_MS|DEVIDX: keys of one
//     batch are (mostly) ascending, so a commit dirties a few pages at the
//     end of one bucket instead of one page per device;
//  2. later, a generation at a time, into the per-device buckets
//     trend/ID/DAY/TIME_MS that queries range-scan, many points per page.
//
// A generation collects points for genSpan, is then sealed, and each later
// Write moves (compacts) the sealed generation's points of up to
// compactPerWrite devices; when all are moved its bucket is dropped. Until a
// point is compacted it is also held in memory (the tail), so queries see
// it without scanning the log. Open rebuilds the tail from the log, so a
// crash loses nothing: compaction is idempotent (same keys, same values) and
// a generation's bucket goes only after all its points are in place.

// genSpan is how long a generation of the recent log collects points.
const genSpan = 15 * time.Second

// compactPerWrite bounds how many devices' points one Write compacts.
const compactPerWrite = 256

var bRecent = []byte("recent")

const recentKeySize = 12

// tailPoint is a trend point not yet compacted (36 bytes).
type tailPoint struct {
	t     int64
	gen   uint32
	flags uint16
	src   uint8
	v     [5]float32
}

func toTail(p *Point, gen uint32) tailPoint {
	return tailPoint{t: p.TimeMS, gen: gen, flags: p.Flags, src: p.Source,
		v: [5]float32{float32(p.SpO2), float32(p.Pulse), float32(p.PI), float32(p.SQI), float32(p.Ratio)}}
}

func (tp *tailPoint) point(device string) Point {
	return Point{Device: device, TimeMS: tp.t, SpO2: float64(tp.v[0]), Pulse: float64(tp.v[1]), PI: float64(tp.v[2]),
		SQI: float64(tp.v[3]), Ratio: float64(tp.v[4]), Flags: tp.flags, Source: tp.src}
}

type sealedGen struct {
	gen     uint32
	pending []string // devices whose points of this generation are not compacted yet
}

// trendTail is the in-memory part of the recent log. byDev is guarded by mu
// (queries read it); the generation bookkeeping only by DB.writeMu.
type trendTail struct {
	mu    sync.RWMutex
	byDev map[string][]tailPoint // per device, ascending time, one point per time

	gen      uint32
	genStart time.Time
	genDevs  map[string]struct{}
	sealed   []*sealedGen // oldest first
}

// add inserts points (time-ordered or not) for one device; a point at an
// existing time replaces it. Caller holds mu.
func (t *trendTail) add(device string, tp tailPoint) {
	s := t.byDev[device]
	n := len(s)
	if n == 0 || s[n-1].t < tp.t {
		t.byDev[device] = append(s, tp)
		return
	}
	i := sort.Search(n, func(i int) bool { return s[i].t >= tp.t })
	if i < n && s[i].t == tp.t {
		s[i] = tp
		return
	}
	s = append(s, tailPoint{})
	copy(s[i+1:], s[i:])
	s[i] = tp
	t.byDev[device] = s
}

// ofGen returns a copy of a device's points of generation gen.
func (t *trendTail) ofGen(device string, gen uint32) []Point {
	t.mu.RLock()
	defer t.mu.RUnlock()
	var out []Point
	for i := range t.byDev[device] {
		if tp := &t.byDev[device][i]; tp.gen == gen {
			out = append(out, tp.point(device))
		}
	}
	return out
}

// drop removes a device's points of generation gen. Caller holds mu.
func (t *trendTail) drop(device string, gen uint32) {
	s := t.byDev[device]
	k := 0
	for _, tp := range s {
		if tp.gen != gen {
			s[k] = tp
			k++
		}
	}
	if k == 0 {
		delete(t.byDev, device)
		return
	}
	clear(s[k:])
	t.byDev[device] = s[:k]
}

// rangeOf copies a device's tail points with from <= t < to.
func (t *trendTail) rangeOf(device string, from, to int64) []Point {
	t.mu.RLock()
	defer t.mu.RUnlock()
	s := t.byDev[device]
	i := sort.Search(len(s), func(i int) bool { return s[i].t >= from })
	j := i + sort.Search(len(s)-i, func(k int) bool { return s[i+k].t >= to })
	if i == j {
		return nil
	}
	out := make([]Point, j-i)
	for k := range out {
		out[k] = s[i+k].point(device)
	}
	return out
}

func (t *trendTail) devices() []string {
	t.mu.RLock()
	defer t.mu.RUnlock()
	out := make([]string, 0, len(t.byDev))
	for d := range t.byDev {
		out = append(out, d)
	}
	return out
}

// loadTail rebuilds the tail from the recent log (Open). Every generation
// found is sealed: it will be compacted by the next writes.
func (db *DB) loadTail(tx *bolt.Tx) error {
	t := &db.tail
	t.byDev, t.genDevs, t.genStart = map[string][]tailPoint{}, map[string]struct{}{}, time.Now()
	names := map[uint32]string{}
	err := tx.Bucket(bDevices).ForEach(func(k, v []byte) error {
		var d Device
		if err := decJSON(v, &d); err != nil {
			return fmt.Errorf("device %q: %w", k, err)
		}
		names[d.Index] = d.ID
		return nil
	})
	if err != nil {
		return err
	}
	root := tx.Bucket(bRecent)
	if root == nil {
		return nil
	}
	return root.ForEachBucket(func(gk []byte) error {
		if len(gk) != 4 {
			return fmt.Errorf("recent log: bad generation key")
		}
		gen := binary.BigEndian.Uint32(gk)
		devs := map[string]struct{}{}
		err := root.Bucket(gk).ForEach(func(k, v []byte) error {
			if len(k) != recentKeySize {
				return fmt.Errorf("recent log: bad key")
			}
			name, ok := names[binary.BigEndian.Uint32(k[8:])]
			if !ok {
				return fmt.Errorf("recent log: point of unknown device index %d", binary.BigEndian.Uint32(k[8:]))
			}
			var p Point
			if err := decodePoint(k[:8], v, &p); err != nil {
				return err
			}
			t.add(name, toTail(&p, gen))
			devs[name] = struct{}{}
			return nil
		})
		if err != nil {
			return err
		}
		sg := &sealedGen{gen: gen}
		for d := range devs {
			sg.pending = append(sg.pending, d)
		}
		sort.Strings(sg.pending)
		t.sealed = append(t.sealed, sg)
		t.gen = gen + 1
		return nil
	})
}

// writeRecent puts points into the current generation's bucket.
func writeRecent(tx *bolt.Tx, gen uint32, pts []Point, index func(string) (uint32, error)) error {
	if len(pts) == 0 {
		return nil
	}
	b, err := nested(tx, bRecent, u32(gen))
	if err != nil {
		return err
	}
	// bbolt keeps references to keys and values until commit: one slab, no reuse.
	slab := make([]byte, len(pts)*(recentKeySize+pointSize))
	for i := range pts {
		p := &pts[i]
		if p.Device == "" {
			return fmt.Errorf("trend point: empty device")
		}
		idx, err := index(p.Device)
		if err != nil {
			return err
		}
		key, val := slab[:recentKeySize:recentKeySize], slab[recentKeySize:recentKeySize+pointSize:recentKeySize+pointSize]
		slab = slab[recentKeySize+pointSize:]
		putKey(key, p.TimeMS)
		binary.BigEndian.PutUint32(key[8:], idx)
		if err := b.Put(key, encodePoint(val, p)); err != nil {
			return err
		}
	}
	return nil
}

// compactPlan is the part of a sealed generation one Write moves.
type compactPlan struct {
	sg      *sealedGen
	devices []string
	drop    bool // every device is moved: drop the generation's bucket
}

// planCompaction seals the current generation when it is old enough and
// picks the next devices to compact. Caller holds writeMu.
func (t *trendTail) planCompaction(now time.Time) *compactPlan {
	if len(t.genDevs) > 0 && now.Sub(t.genStart) >= genSpan {
		sg := &sealedGen{gen: t.gen}
		for d := range t.genDevs {
			sg.pending = append(sg.pending, d)
		}
		sort.Strings(sg.pending)
		t.sealed = append(t.sealed, sg)
		t.gen++
		t.genDevs = map[string]struct{}{}
		t.genStart = now
	}
	if len(t.sealed) == 0 {
		return nil
	}
	sg := t.sealed[0]
	k := min(len(sg.pending), compactPerWrite)
	return &compactPlan{sg: sg, devices: sg.pending[:k], drop: k == len(sg.pending)}
}

// compact moves the planned devices' points into their per-device buckets.
func (db *DB) compact(tx *bolt.Tx, plan *compactPlan) error {
	for _, d := range plan.devices {
		if err := writePoints(tx, db.tail.ofGen(d, plan.sg.gen)); err != nil {
			return err
		}
	}
	if plan.drop {
		if err := tx.Bucket(bRecent).DeleteBucket(u32(plan.sg.gen)); err != nil && !errors.Is(err, bolterrors.ErrBucketNotFound) {
			return err
		}
	}
	return nil
}

// afterCommit records a committed batch in the tail. Caller holds writeMu.
func (t *trendTail) afterCommit(pts []Point, plan *compactPlan) {
	t.mu.Lock()
	defer t.mu.Unlock()
	for i := range pts {
		t.add(pts[i].Device, toTail(&pts[i], t.gen))
		t.genDevs[pts[i].Device] = struct{}{}
	}
	if plan == nil {
		return
	}
	for _, d := range plan.devices {
		t.drop(d, plan.sg.gen)
	}
	plan.sg.pending = plan.sg.pending[len(plan.devices):]
	if plan.drop {
		t.sealed = t.sealed[1:]
	}
}

// mergeTail emits compacted points and tail points in time order; a tail
// point replaces a compacted one at the same time. It returns false when fn
// asked to stop.
type merger struct {
	tail []Point
	i    int
	fn   func(Point) bool
}

func (m *merger) emit(p Point) bool {
	for m.i < len(m.tail) && m.tail[m.i].TimeMS < p.TimeMS {
		if !m.fn(m.tail[m.i]) {
			return false
		}
		m.i++
	}
	if m.i < len(m.tail) && m.tail[m.i].TimeMS == p.TimeMS {
		return true // the tail holds the newer write of this second
	}
	return m.fn(p)
}

func (m *merger) rest() bool {
	for ; m.i < len(m.tail); m.i++ {
		if !m.fn(m.tail[m.i]) {
			return false
		}
	}
	return true
}

// CompactAll moves every point of the recent log into the per-device
// buckets now (Prune does it first, so retention sees every point).
func (db *DB) CompactAll() error {
	db.writeMu.Lock()
	defer db.writeMu.Unlock()
	return db.compactAllLocked()
}

// compactAllLocked is CompactAll for a caller that holds writeMu.
func (db *DB) compactAllLocked() error {
	t := &db.tail
	// Seal the current generation whatever its age.
	t.genStart = time.Time{}
	for {
		plan := t.planCompaction(time.Now())
		if plan == nil {
			return nil
		}
		if err := db.update(func(tx *bolt.Tx) error { return db.compact(tx, plan) }); err != nil {
			return fmt.Errorf("store: compact trend generation %d: %w", plan.sg.gen, err)
		}
		t.afterCommit(nil, plan)
	}
}
