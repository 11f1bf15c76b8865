package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"sort"

	bolt "go.etcd.io/bbolt"
)

// Trend blocks (format version 2): the per-device day buckets hold blocks
// of up to blockMax points of one device and day,
//
//	trend/ID/DAY/FIRST_TIME_MS   block (version 2)
//
// keyed by the time of their first point. Blocks (and any release-1 point
// records, keyed by their own time) of a day bucket never overlap in time
// and are in key order, so a query reads them in order. Compaction appends
// a device's new points to its last block while it has room and they come
// after it; points that overlap stored ones in time (written out of order)
// are merged with the records they overlap, which are written again as
// blocks, so the order holds.
//
// A block: version byte, n (uvarint), last time - first time (uvarint), the
// n-1 time steps as zigzag varints of (step - 1000 ms), flags and source as
// run-length pairs (run, value; uvarints), then one column per value (SpO2,
// pulse, PI, SQI, ratio) of n little-endian int16 fixed-point codes
// q = round(value x scale), where -32768 is NaN (missing) and -32767 says
// the value is beyond the range (its float32 follows the columns, in
// column order). Fixed width rather than varint deltas: an estimate's
// values jitter by more than a varint byte holds at these resolutions, so
// deltas would save little, and fixed width decodes without a dependency
// from one value to the next (the 24 h query of a device reads 432,000
// values). Values come back as float32, as release 1 stored them, rounded
// to the resolution below (q x 1/scale, rounded to float32).

// Value codes: a fixed-point int16, or one of two reserved codes.
const (
	qNaN    = math.MinInt16     // missing value (NaN)
	qEscape = math.MinInt16 + 1 // value beyond the fixed-point range: its float32 follows the columns
	qMin    = math.MinInt16 + 2
)

const (
	vTrendBlock = 2
	// A block holds up to blockBytes encoded (about 360 points, 6 minutes
	// of 1 Hz trend): bbolt puts at least two records on a page, so two
	// blocks fill two 4 KiB pages instead of leaving a third of them empty.
	blockBytes = 4000
	blockMax   = 400 // and at most this many points
)

// trendScale is the fixed-point resolution of each value: SpO2 0.01 %,
// pulse 0.01 /min, PI 0.001 %, SQI 0.001, ratio of ratios 0.0001 (0.0025 %
// SpO2 on the common-practice line 110 - 25 R). int16 codes reach 327.67 %
// and /min, PI 32.767 %, ratio 3.2767; beyond, a value is kept as float32.
var trendScale = [5]float64{100, 100, 1000, 1000, 10_000}

// TrendResolution is the resolution stored trend values keep: a value
// read back is within half of it (and float32 rounding) of the value
// written. A test comparing stored values with a rounded print of them
// allows for it.
var TrendResolution = struct{ SpO2, Pulse, PI, SQI, Ratio float64 }{1 / trendScale[0], 1 / trendScale[1], 1 / trendScale[2], 1 / trendScale[3], 1 / trendScale[4]}

func isBlock(v []byte) bool { return len(v) > 0 && v[0] == vTrendBlock }

func pointValues(p *Point) [5]float64 { return [5]float64{p.SpO2, p.Pulse, p.PI, p.SQI, p.Ratio} }

// encodeBlock encodes points of one device and day, in ascending time.
func encodeBlock(pts []Point) []byte {
	n := len(pts)
	b := make([]byte, 0, 8+n*12)
	b = append(b, vTrendBlock)
	b = binary.AppendUvarint(b, uint64(n))
	b = binary.AppendUvarint(b, uint64(pts[n-1].TimeMS-pts[0].TimeMS))
	for i := 1; i < n; i++ {
		b = binary.AppendVarint(b, pts[i].TimeMS-pts[i-1].TimeMS-1000)
	}
	b = appendRuns(b, pts, func(p *Point) uint64 { return uint64(p.Flags) })
	b = appendRuns(b, pts, func(p *Point) uint64 { return uint64(p.Source) })
	var esc []float32
	for f := 0; f < 5; f++ {
		for i := range pts {
			x := pointValues(&pts[i])[f]
			v := x * trendScale[f]
			var q int64
			switch {
			case math.IsNaN(x):
				q = qNaN
			case v >= qMin-0.5 && v < math.MaxInt16+0.5:
				q = int64(math.Round(v))
			default:
				q = qEscape
				esc = append(esc, float32(x))
			}
			b = binary.LittleEndian.AppendUint16(b, uint16(int16(q)))
		}
	}
	for _, x := range esc {
		b = binary.LittleEndian.AppendUint32(b, math.Float32bits(x))
	}
	return b
}

func appendRuns(b []byte, pts []Point, val func(*Point) uint64) []byte {
	for i := 0; i < len(pts); {
		j := i + 1
		for j < len(pts) && val(&pts[j]) == val(&pts[i]) {
			j++
		}
		b = binary.AppendUvarint(b, uint64(j-i))
		b = binary.AppendUvarint(b, val(&pts[i]))
		i = j
	}
	return b
}

// slicesGrow extends dst by n points (their fields are all written by the
// caller), reusing its capacity.
func slicesGrow(dst []Point, n int) []Point {
	if cap(dst)-len(dst) < n {
		nd := make([]Point, len(dst), 2*cap(dst)+n)
		copy(nd, dst)
		dst = nd
	}
	return dst[:len(dst)+n]
}

var errBadBlock = errors.New("bad trend block")

// blockReader decodes a block's bytes.
type blockReader struct {
	v   []byte
	off int
	err error
}

func (r *blockReader) uvarint() uint64 {
	if r.off < len(r.v) && r.v[r.off] < 0x80 {
		r.off++
		return uint64(r.v[r.off-1])
	}
	x, n := binary.Uvarint(r.v[r.off:])
	if n <= 0 {
		r.err, r.off = errBadBlock, len(r.v)
		return 0
	}
	r.off += n
	return x
}

func (r *blockReader) varint() int64 {
	if r.off < len(r.v) && r.v[r.off] < 0x80 {
		u := uint64(r.v[r.off])
		r.off++
		return int64(u>>1) ^ -int64(u&1)
	}
	x, n := binary.Varint(r.v[r.off:])
	if n <= 0 {
		r.err, r.off = errBadBlock, len(r.v)
		return 0
	}
	r.off += n
	return x
}

// blockSpan returns a block's first and last time and point count.
func blockSpan(k, v []byte) (first, last int64, n int, err error) {
	if len(k) != 8 || !isBlock(v) {
		return 0, 0, 0, errBadBlock
	}
	r := blockReader{v: v, off: 1}
	n = int(r.uvarint())
	span := r.uvarint()
	if r.err != nil || n < 1 || n > blockMax || span > 1<<40 {
		return 0, 0, 0, fmt.Errorf("%w: %d points over %d ms", errBadBlock, n, span)
	}
	first = keyTime(k)
	return first, first + int64(span), n, nil
}

// decodeBlock appends a block's points to dst (Device left empty).
func decodeBlock(k, v []byte, dst []Point) ([]Point, error) {
	first, last, n, err := blockSpan(k, v)
	if err != nil {
		return dst, err
	}
	r := blockReader{v: v, off: 1}
	r.uvarint()
	r.uvarint()
	base := len(dst)
	dst = slicesGrow(dst, n)
	pts := dst[base:]
	t := first
	pts[0].TimeMS = t
	for i := 1; i < n; i++ {
		step := r.varint() + 1000
		if step <= 0 {
			return dst[:base], fmt.Errorf("%w: times not ascending", errBadBlock)
		}
		t += step
		pts[i].TimeMS = t
	}
	if r.err != nil || t != last {
		return dst[:base], fmt.Errorf("%w: times end at %d, header says %d", errBadBlock, t, last)
	}
	if err := decodeRuns(&r, pts); err != nil {
		return dst[:base], err
	}
	if err := decodeColumns(&r, pts); err != nil {
		return dst[:base], err
	}
	if r.err != nil || r.off != len(v) {
		return dst[:base], fmt.Errorf("%w: %d bytes left over", errBadBlock, len(v)-r.off)
	}
	return dst, nil
}

// decodeRuns reads a block's two run-length columns (flags, then source)
// into pts.
func decodeRuns(r *blockReader, pts []Point) error {
	n := len(pts)
	for c := 0; c < 2; c++ {
		for i := 0; i < n; {
			run, val := int(r.uvarint()), r.uvarint()
			if r.err != nil || run < 1 || run > n-i || (c == 0 && val > math.MaxUint16) || (c == 1 && val > math.MaxUint8) {
				return fmt.Errorf("%w: runs", errBadBlock)
			}
			for j := i; j < i+run; j++ {
				if c == 0 {
					pts[j].Flags = uint16(val)
				} else {
					pts[j].Source = uint8(val)
				}
			}
			i += run
		}
	}
	return nil
}

// decodeColumns reads a block's five value columns (with the escaped
// values after them) into pts.
func decodeColumns(r *blockReader, pts []Point) error {
	n := len(pts)
	if r.err != nil || len(r.v)-r.off < 10*n {
		return fmt.Errorf("%w: short value columns", errBadBlock)
	}
	cols := r.v[r.off : r.off+10*n]
	r.off += 10 * n
	var col [blockMax]float64
	for f := 0; f < 5; f++ {
		inv := 1 / trendScale[f]
		c := cols[2*n*f : 2*n*(f+1)]
		for i := 0; i < n; i++ {
			q := int16(binary.LittleEndian.Uint16(c[2*i:]))
			switch q {
			case qNaN:
				col[i] = math.NaN()
			case qEscape:
				if r.off+4 > len(r.v) {
					return fmt.Errorf("%w: short escaped value", errBadBlock)
				}
				col[i] = float64(math.Float32frombits(binary.LittleEndian.Uint32(r.v[r.off:])))
				r.off += 4
			default:
				col[i] = float64(float32(float64(q) * inv))
			}
		}
		switch f {
		case 0:
			for i := range pts {
				pts[i].SpO2 = col[i]
			}
		case 1:
			for i := range pts {
				pts[i].Pulse = col[i]
			}
		case 2:
			for i := range pts {
				pts[i].PI = col[i]
			}
		case 3:
			for i := range pts {
				pts[i].SQI = col[i]
			}
		default:
			for i := range pts {
				pts[i].Ratio = col[i]
			}
		}
	}
	return nil
}

// decodeTrendRecord appends the points of a day-bucket record of either
// version: a release-1 point or a block.
func decodeTrendRecord(k, v []byte, dst []Point) ([]Point, error) {
	if isBlock(v) {
		return decodeBlock(k, v, dst)
	}
	var p Point
	if err := decodePoint(k, v, &p); err != nil {
		return dst, err
	}
	return append(dst, p), nil
}

// recordSpan is the time range a day-bucket record covers.
func recordSpan(k, v []byte) (first, last int64, n int, err error) {
	if isBlock(v) {
		return blockSpan(k, v)
	}
	if len(k) != 8 {
		return 0, 0, 0, errBadBlock
	}
	return keyTime(k), keyTime(k), 1, nil
}

// putDayPoints writes one device's points of one day (ascending time) into
// its day bucket as blocks: appended to the last block when they follow it
// and it has room, else merged with the records they overlap.
func putDayPoints(day *bolt.Bucket, pts []Point) error {
	day.FillPercent = 0.9 // appended in time order: pack pages instead of splitting them in half
	first, last := pts[0].TimeMS, pts[len(pts)-1].TimeMS
	var fk [8]byte
	putKey(fk[:], first)
	var old []Point
	var del [][]byte
	c := day.Cursor()
	k, _ := c.Seek(fk[:])
	var pk, pv []byte
	if k == nil {
		pk, pv = c.Last()
	} else {
		pk, pv = c.Prev()
	}
	if isBlock(pv) {
		_, plast, pn, err := blockSpan(pk, pv)
		if err != nil {
			return err
		}
		if plast >= first || (pn+len(pts) <= blockMax && len(pv)+pointsBytes(pts) <= blockBytes) {
			if old, err = decodeBlock(pk, pv, old); err != nil {
				return err
			}
			del = append(del, clone(pk))
		}
	}
	for k, v := c.Seek(fk[:]); len(k) == 8 && keyTime(k) <= last; k, v = c.Next() {
		var err error
		if old, err = decodeTrendRecord(k, v, old); err != nil {
			return err
		}
		del = append(del, clone(k))
	}
	all := pts
	if len(old) > 0 {
		all = mergePoints(old, pts)
	}
	for _, k := range del {
		if err := day.Delete(k); err != nil {
			return err
		}
	}
	for i, n := 0, 0; i < len(all); i += n {
		n = blockFit(all[i:])
		blk := all[i : i+n]
		key := make([]byte, 8)
		putKey(key, blk[0].TimeMS)
		if err := day.Put(key, encodeBlock(blk)); err != nil {
			return err
		}
	}
	return nil
}

// pointsBytes bounds the bytes points add to a block.
func pointsBytes(pts []Point) int {
	sz := 0
	for i := range pts {
		sz += pointBytes(pts, i)
	}
	return sz
}

// pointBytes bounds the bytes point i adds to a block holding pts[:i].
func pointBytes(pts []Point, i int) int {
	sz := 10 // five int16 codes
	if i > 0 {
		sz += varintLen(pts[i].TimeMS - pts[i-1].TimeMS - 1000)
		if pts[i].Flags != pts[i-1].Flags || pts[i].Source != pts[i-1].Source {
			sz += 10 // new runs
		}
	} else {
		sz += 10 // header and first runs
	}
	v := pointValues(&pts[i])
	for f, x := range v {
		if y := x * trendScale[f]; !math.IsNaN(x) && !(y >= qMin-0.5 && y < math.MaxInt16+0.5) {
			sz += 4
		}
	}
	return sz
}

func varintLen(x int64) int {
	var b [binary.MaxVarintLen64]byte
	return binary.PutVarint(b[:], x)
}

// blockFit is how many of pts (at least one) the next block takes.
func blockFit(pts []Point) int {
	sz, n := 8, 0
	for n < len(pts) && n < blockMax {
		sz += pointBytes(pts, n)
		if sz > blockBytes && n > 0 {
			break
		}
		n++
	}
	return n
}

// mergePoints merges stored points with new ones by time; at a time both
// hold, the stored one stays (keep the first).
func mergePoints(old, pts []Point) []Point {
	sort.SliceStable(old, func(i, j int) bool { return old[i].TimeMS < old[j].TimeMS })
	out := make([]Point, 0, len(old)+len(pts))
	i, j := 0, 0
	for i < len(old) || j < len(pts) {
		switch {
		case j == len(pts) || (i < len(old) && old[i].TimeMS < pts[j].TimeMS):
			out = append(out, old[i])
			i++
		case i == len(old) || pts[j].TimeMS < old[i].TimeMS:
			out = append(out, pts[j])
			j++
		default:
			out = append(out, old[i])
			i, j = i+1, j+1
		}
	}
	return out
}

// emitBlock calls fn for the points of a block with from <= time < to,
// decoding each point from the columns as it goes (no intermediate slice:
// this is the query's hot path). Blocks with escaped values take the
// general decoder. It returns false when fn asked to stop.
func emitBlock(k, v []byte, from, to int64, p *Point, buf *[]Point, fn func(Point) bool) (bool, error) {
	first, last, n, err := blockSpan(k, v)
	if err != nil {
		return false, err
	}
	if last < from || first >= to {
		return true, nil
	}
	r := blockReader{v: v, off: 1}
	r.uvarint()
	r.uvarint()
	var times [blockMax]int64
	t := first
	times[0] = t
	for i := 1; i < n; i++ {
		step := r.varint() + 1000
		if step <= 0 {
			return false, fmt.Errorf("%w: times not ascending", errBadBlock)
		}
		t += step
		times[i] = t
	}
	if r.err != nil || t != last {
		return false, fmt.Errorf("%w: times end at %d, header says %d", errBadBlock, t, last)
	}
	var runs [2][]uint64 // run, value pairs
	var runBuf [2][8]uint64
	for c := 0; c < 2; c++ {
		runs[c] = runBuf[c][:0]
		for i := 0; i < n; {
			run, val := int(r.uvarint()), r.uvarint()
			if r.err != nil || run < 1 || run > n-i || (c == 0 && val > math.MaxUint16) || (c == 1 && val > math.MaxUint8) {
				return false, fmt.Errorf("%w: runs", errBadBlock)
			}
			runs[c] = append(runs[c], uint64(run), val)
			i += run
		}
	}
	if len(v)-r.off != 10*n {
		// Escaped values follow the columns (or the block is damaged):
		// the general decoder handles both.
		return emitDecoded(k, v, from, to, p.Device, buf, fn)
	}
	cols := v[r.off:]
	c0, c1, c2, c3, c4 := cols[:2*n], cols[2*n:4*n], cols[4*n:6*n], cols[6*n:8*n], cols[8*n:10*n]
	var ri, rleft [2]int
	for c := 0; c < 2; c++ {
		rleft[c] = int(runs[c][0])
	}
	for i := 0; i < n; i++ {
		for c := 0; c < 2; c++ {
			if rleft[c] == 0 {
				ri[c] += 2
				rleft[c] = int(runs[c][ri[c]])
			}
			rleft[c]--
		}
		if times[i] < from {
			continue
		}
		if times[i] >= to {
			break
		}
		p.TimeMS = times[i]
		p.Flags, p.Source = uint16(runs[0][ri[0]+1]), uint8(runs[1][ri[1]+1])
		p.SpO2, p.Pulse, p.PI = fixedValue(c0, i, 1.0/100), fixedValue(c1, i, 1.0/100), fixedValue(c2, i, 1.0/1000)
		p.SQI, p.Ratio = fixedValue(c3, i, 1.0/1000), fixedValue(c4, i, 1.0/10_000)
		if !fn(*p) {
			return false, nil
		}
	}
	return true, nil
}

// emitDecoded is emitBlock for a block with escaped values: it decodes the
// block into *buf with decodeBlock and calls fn for the points with
// from <= time < to.
func emitDecoded(k, v []byte, from, to int64, device string, buf *[]Point, fn func(Point) bool) (bool, error) {
	pts, err := decodeBlock(k, v, (*buf)[:0])
	*buf = pts
	if err != nil {
		return false, err
	}
	for i := range pts {
		if pts[i].TimeMS >= from && pts[i].TimeMS < to {
			pts[i].Device = device
			if !fn(pts[i]) {
				return false, nil
			}
		}
	}
	return true, nil
}

// fixedValue decodes code i of a column without escapes (the scales are
// trendScale's, as constants so the compiler keeps them in registers).
func fixedValue(c []byte, i int, inv float64) float64 {
	q := int16(uint16(c[2*i]) | uint16(c[2*i+1])<<8)
	if q == qNaN {
		return math.NaN()
	}
	return float64(float32(float64(q) * inv))
}
