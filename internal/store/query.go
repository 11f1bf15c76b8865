package store

import (
	"encoding/binary"
	"fmt"
	"math"
	"sort"

	bolt "go.etcd.io/bbolt"
)

// Devices returns every device record, ordered by id.
func (db *DB) Devices() ([]Device, error) {
	var out []Device
	err := db.view(func(tx *bolt.Tx) error {
		return tx.Bucket(bDevices).ForEach(func(k, v []byte) error {
			var d Device
			if err := decJSON(v, &d); err != nil {
				return fmt.Errorf("device %q: %w", k, err)
			}
			out = append(out, d)
			return nil
		})
	})
	if err != nil {
		return nil, fmt.Errorf("store: devices: %w", err)
	}
	return out, nil
}

// Device returns one device record or ErrNotFound.
func (db *DB) Device(id string) (Device, error) {
	var d Device
	err := db.view(func(tx *bolt.Tx) error {
		v := tx.Bucket(bDevices).Get([]byte(id))
		if v == nil {
			return ErrNotFound
		}
		return decJSON(v, &d)
	})
	if err != nil {
		return Device{}, fmt.Errorf("store: device %q: %w", id, err)
	}
	return d, nil
}

// Trend calls fn for each point of device with fromMS <= time < toMS, oldest
// first, until fn returns false. Point.Device is set. Points not yet
// compacted (see tail.go) are merged in.
func (db *DB) Trend(device string, fromMS, toMS int64, fn func(Point) bool) error {
	if toMS <= fromMS {
		return nil
	}
	// The tail is copied before the transaction starts: a compaction that
	// commits in between leaves its points in both (the merge keeps one),
	// never in neither.
	m := &merger{fn: fn, tail: db.tail.rangeOf(device, fromMS, toMS)}
	err := db.view(func(tx *bolt.Tx) error {
		dev := tx.Bucket(bTrend).Bucket([]byte(device))
		if dev == nil {
			if !m.rest() {
				return errStop
			}
			return nil
		}
		var from [8]byte
		putKey(from[:], fromMS)
		var buf []Point
		pt := Point{Device: device}
		emit := m.emit
		c := dev.Cursor()
		// Day buckets, from the day of fromMS on.
		for dk, _ := c.Seek(u32(dayOf(fromMS))); dk != nil; dk, _ = c.Next() {
			if len(dk) != 4 || binary.BigEndian.Uint32(dk) > dayOf(toMS-1) {
				break
			}
			day := dev.Bucket(dk)
			if day == nil {
				continue
			}
			if err := trendDay(day, from[:], fromMS, toMS, &pt, &buf, emit); err != nil {
				return err
			}
		}
		if !m.rest() {
			return errStop
		}
		return nil
	})
	if err == errStop {
		err = nil
	}
	if err != nil {
		return fmt.Errorf("store: trend %q: %w", device, err)
	}
	return nil
}

// trendDay is Trend for one day bucket: it calls emit for the points with
// fromMS <= time < toMS (from is fromMS as a key), starting with the block
// before fromMS when it may hold it. It returns errStop when emit asked to
// stop.
func trendDay(day *bolt.Bucket, from []byte, fromMS, toMS int64, pt *Point, buf *[]Point, emit func(Point) bool) error {
	// The record before fromMS may be a block that holds it.
	pc := day.Cursor()
	k, v := pc.Seek(from)
	if k == nil || len(k) != 8 || keyTime(k) > fromMS {
		var pk, pv []byte
		if k == nil {
			pk, pv = pc.Last()
		} else {
			pk, pv = pc.Prev()
		}
		if pk != nil && isBlock(pv) {
			k, v = pk, pv
		} else {
			k, v = pc.Seek(from)
		}
	}
	for ; k != nil; k, v = pc.Next() {
		if len(k) == 8 && keyTime(k) >= toMS {
			break
		}
		if isBlock(v) {
			more, err := emitBlock(k, v, fromMS, toMS, pt, buf, emit)
			if err != nil {
				return err
			}
			if !more {
				return errStop
			}
			continue
		}
		if err := decodePoint(k, v, pt); err != nil {
			return err
		}
		if pt.TimeMS >= fromMS && !emit(*pt) {
			return errStop
		}
	}
	return nil
}

// TrendDevices lists the devices that have trend points, ordered by id.
func (db *DB) TrendDevices() ([]string, error) {
	seen := map[string]bool{}
	for _, d := range db.tail.devices() {
		seen[d] = true
	}
	err := db.view(func(tx *bolt.Tx) error {
		return tx.Bucket(bTrend).ForEachBucket(func(k []byte) error {
			seen[string(k)] = true
			return nil
		})
	})
	out := make([]string, 0, len(seen))
	for d := range seen {
		out = append(out, d)
	}
	sort.Strings(out)
	return out, err
}

type stopErr struct{}

func (stopErr) Error() string { return "stop" }

var errStop error = stopErr{}

// Stat summarises one quantity over a step.
type Stat struct {
	Count          uint32
	Min, Mean, Max float64
}

func (s *Stat) add(v float64) {
	if math.IsNaN(v) {
		return
	}
	if s.Count == 0 || v < s.Min {
		s.Min = v
	}
	if s.Count == 0 || v > s.Max {
		s.Max = v
	}
	s.Mean += v // sum until finish
	s.Count++
}

func (s *Stat) finish() {
	if s.Count > 0 {
		s.Mean /= float64(s.Count)
	}
}

// Bucket is one downsampling step.
type Bucket struct {
	StartMS              int64
	Points               uint32
	SpO2, Pulse, PI, SQI Stat
}

// TrendBuckets downsamples a device's trend to steps of stepMS aligned to the
// Unix epoch; steps without points are left out.
func (db *DB) TrendBuckets(device string, fromMS, toMS, stepMS int64) ([]Bucket, error) {
	if stepMS <= 0 {
		return nil, fmt.Errorf("store: step %d ms, want > 0", stepMS)
	}
	var out []Bucket
	var cur *Bucket
	err := db.Trend(device, fromMS, toMS, func(p Point) bool {
		start := p.TimeMS - mod(p.TimeMS, stepMS)
		if cur == nil || cur.StartMS != start {
			if cur != nil {
				cur.finish()
			}
			out = append(out, Bucket{StartMS: start})
			cur = &out[len(out)-1]
		}
		cur.Points++
		cur.SpO2.add(p.SpO2)
		cur.Pulse.add(p.Pulse)
		cur.PI.add(p.PI)
		cur.SQI.add(p.SQI)
		return true
	})
	if cur != nil {
		cur.finish()
	}
	return out, err
}

func (b *Bucket) finish() { b.SpO2.finish(); b.Pulse.finish(); b.PI.finish(); b.SQI.finish() }

func mod(a, b int64) int64 {
	m := a % b
	if m < 0 {
		m += b
	}
	return m
}

// LedgerTotal sums a device's ledger records.
type LedgerTotal struct {
	Chunks  uint64
	Samples uint64
	MaxSeq  uint64
	// Distinct is false when a sequence number appears twice (a defect).
	Distinct bool
}

// SessionsSince returns a device's sessions that were open at or after
// fromMS (ended at or after it, or not ended), oldest first, however long
// ago they started. It walks back from the newest and stops at the first
// session that ended before fromMS: a device's sessions follow one another.
func (db *DB) SessionsSince(device string, fromMS int64) ([]Session, error) {
	var out []Session
	err := db.view(func(tx *bolt.Tx) error {
		b := tx.Bucket(bSessions).Bucket([]byte(device))
		if b == nil {
			return nil
		}
		c := b.Cursor()
		for k, v := c.Last(); k != nil; k, v = c.Prev() {
			var s Session
			if err := decJSON(v, &s); err != nil {
				return err
			}
			if s.EndMS != 0 && s.EndMS < fromMS {
				break
			}
			out = append(out, s)
		}
		return nil
	})
	for i, j := 0, len(out)-1; i < j; i, j = i+1, j-1 {
		out[i], out[j] = out[j], out[i]
	}
	return out, err
}

// EpisodeFilter selects episodes; zero fields do not filter.
type EpisodeFilter struct {
	Device     string
	FromMS     int64 // onset >= FromMS
	ToMS       int64 // onset < ToMS
	ActiveOnly bool
	Limit      int // 0 = no limit
}

// Episodes returns matching episodes, newest onset first.
func (db *DB) Episodes(f EpisodeFilter) ([]Episode, error) {
	var out []Episode
	err := db.view(func(tx *bolt.Tx) error {
		return tx.Bucket(bEpisodes).ForEach(func(k, v []byte) error {
			var e Episode
			if err := decJSON(v, &e); err != nil {
				return err
			}
			if (f.Device != "" && e.Device != f.Device) || (f.FromMS != 0 && e.OnsetMS < f.FromMS) ||
				(f.ToMS != 0 && e.OnsetMS >= f.ToMS) || (f.ActiveOnly && !e.Active) {
				return nil
			}
			out = append(out, e)
			return nil
		})
	})
	sort.SliceStable(out, func(i, j int) bool {
		if out[i].OnsetMS != out[j].OnsetMS {
			return out[i].OnsetMS > out[j].OnsetMS
		}
		return out[i].ID > out[j].ID
	})
	if f.Limit > 0 && len(out) > f.Limit {
		out = out[:f.Limit]
	}
	return out, err
}

// AlarmStates returns every stored alarm-engine snapshot by device.
func (db *DB) AlarmStates() (map[string][]byte, error) {
	out := map[string][]byte{}
	err := db.view(func(tx *bolt.Tx) error {
		return tx.Bucket(bAlarmState).ForEach(func(k, v []byte) error {
			out[string(k)] = clone(v)
			return nil
		})
	})
	return out, err
}

// RawCaptures calls fn for each captured chunk of device with device time in
// [fromMS, toMS), in sequence order within a day.
func (db *DB) RawCaptures(device string, fromMS, toMS int64, fn func(RawCapture) bool) error {
	err := db.view(func(tx *bolt.Tx) error {
		dev := tx.Bucket(bRaw).Bucket([]byte(device))
		if dev == nil {
			return nil
		}
		c := dev.Cursor()
		for dk, _ := c.Seek(u32(dayOf(fromMS))); dk != nil; dk, _ = c.Next() {
			if binary.BigEndian.Uint32(dk) > dayOf(toMS-1) {
				break
			}
			err := dev.Bucket(dk).ForEach(func(k, v []byte) error {
				more, err := decodeRawRecord(k, v, func(r RawCapture) bool {
					if r.DeviceTimeMS < fromMS || r.DeviceTimeMS >= toMS {
						return true
					}
					r.Device = device
					return fn(r)
				})
				if err != nil {
					return err
				}
				if !more {
					return errStop
				}
				return nil
			})
			if err != nil {
				return err
			}
		}
		return nil
	})
	if err == errStop {
		return nil
	}
	return err
}

// Cursors returns every device's cursor by device id.
func (db *DB) Cursors() (map[string]Cursor, error) {
	out := map[string]Cursor{}
	err := db.view(func(tx *bolt.Tx) error {
		return tx.Bucket(bCursors).ForEach(func(k, v []byte) error {
			c := Cursor{Device: string(k)}
			if err := decodeCursor(v, &c); err != nil {
				return fmt.Errorf("cursor %q: %w", k, err)
			}
			out[c.Device] = c
			return nil
		})
	})
	if err != nil {
		return nil, fmt.Errorf("store: cursors: %w", err)
	}
	return out, nil
}

// TrendSliced is Trend read in slices of at most perTx points, each in its
// own short read transaction (0 means 10,000): a long export never holds
// one read transaction open for long, so bbolt can reuse the pages that
// ingest frees meanwhile and the file does not grow. Points have distinct
// times per device, so each slice resumes after the last time sent.
func (db *DB) TrendSliced(device string, fromMS, toMS int64, perTx int, fn func(Point) bool) error {
	if perTx <= 0 {
		perTx = 10_000
	}
	for fromMS < toMS {
		n, stopped := 0, false
		last := fromMS
		err := db.Trend(device, fromMS, toMS, func(p Point) bool {
			if !fn(p) {
				stopped = true
				return false
			}
			last, n = p.TimeMS, n+1
			return n < perTx
		})
		if err != nil || stopped || n < perTx {
			return err
		}
		fromMS = last + 1
	}
	return nil
}
