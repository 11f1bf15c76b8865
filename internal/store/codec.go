package store

import (
	"encoding/binary"
	"fmt"
	"math"
)

const pointSize = 1 + 2 + 1 + 5*4

func putF32(b []byte, v float64) { binary.BigEndian.PutUint32(b, math.Float32bits(float32(v))) }
func getF32(b []byte) float64 {
	f := math.Float32frombits(binary.BigEndian.Uint32(b))
	return float64(f)
}

func encodePoint(b []byte, p *Point) []byte {
	b = b[:pointSize]
	b[0] = vPoint
	binary.BigEndian.PutUint16(b[1:], p.Flags)
	b[3] = p.Source
	putF32(b[4:], p.SpO2)
	putF32(b[8:], p.Pulse)
	putF32(b[12:], p.PI)
	putF32(b[16:], p.SQI)
	putF32(b[20:], p.Ratio)
	return b
}

func decodePoint(k, v []byte, p *Point) error {
	if len(k) != 8 || len(v) < pointSize || v[0] != vPoint {
		return fmt.Errorf("bad trend record (key %d bytes, value %d bytes, version %d)", len(k), len(v), firstByte(v))
	}
	p.TimeMS = int64(binary.BigEndian.Uint64(k))
	p.Flags = binary.BigEndian.Uint16(v[1:])
	p.Source = v[3]
	p.SpO2 = getF32(v[4:])
	p.Pulse = getF32(v[8:])
	p.PI = getF32(v[12:])
	p.SQI = getF32(v[16:])
	p.Ratio = getF32(v[20:])
	return nil
}

// ledger key: arrival ms (8) | device index (4) | seq (8); value: version | device time (8) | samples (4)
const ledgerKeySize = 20
const ledgerValSize = 13

func encodeChunk(k, v []byte, c *Chunk, devIdx uint32) {
	binary.BigEndian.PutUint64(k[0:], uint64(c.ArrivalMS))
	binary.BigEndian.PutUint32(k[8:], devIdx)
	binary.BigEndian.PutUint64(k[12:], c.Seq)
	v[0] = vChunk
	binary.BigEndian.PutUint64(v[1:], uint64(c.DeviceTimeMS))
	binary.BigEndian.PutUint32(v[9:], c.Samples)
}

func decodeRaw(v []byte, r *RawCapture) error {
	if len(v) < 25 || v[0] != vRaw {
		return fmt.Errorf("bad raw record")
	}
	r.DeviceTimeMS = int64(binary.BigEndian.Uint64(v[1:]))
	r.RateHz = math.Float64frombits(binary.BigEndian.Uint64(v[9:]))
	n := int(binary.BigEndian.Uint32(v[17:]))
	na := int(binary.BigEndian.Uint32(v[21:]))
	if len(v) != 25+4*(2*n+na) {
		return fmt.Errorf("bad raw record length")
	}
	read := func(off, cnt int) []uint32 {
		out := make([]uint32, cnt)
		for i := range out {
			out[i] = binary.BigEndian.Uint32(v[off+4*i:])
		}
		return out
	}
	r.Red = read(25, n)
	r.IR = read(25+4*n, n)
	r.Ambient = read(25+8*n, na)
	return nil
}

// cursorSize is a cursor record with LastDeviceMS; cursorSizeV0 one written
// before it existed (decoded with LastDeviceMS 0: unknown).
const (
	cursorSizeV0 = 1 + 7*8 + 8
	cursorSize   = cursorSizeV0 + 8
)

func encodeCursor(c *Cursor) []byte {
	b := make([]byte, 0, cursorSize)
	b = append(b, vCursor)
	for _, v := range []uint64{c.LastSeq, c.Chunks, c.Samples, c.Lost, c.Duplicates, c.Rejected, c.Late, uint64(c.LastSeenMS), uint64(c.LastDeviceMS)} {
		b = binary.BigEndian.AppendUint64(b, v)
	}
	return b
}

func decodeCursor(v []byte, c *Cursor) error {
	if (len(v) != cursorSize && len(v) != cursorSizeV0) || v[0] != vCursor {
		return fmt.Errorf("bad cursor record (%d bytes, version %d)", len(v), firstByte(v))
	}
	f := []*uint64{&c.LastSeq, &c.Chunks, &c.Samples, &c.Lost, &c.Duplicates, &c.Rejected, &c.Late}
	for i, p := range f {
		*p = binary.BigEndian.Uint64(v[1+8*i:])
	}
	c.LastSeenMS = int64(binary.BigEndian.Uint64(v[1+8*7:]))
	c.LastDeviceMS = 0
	if len(v) == cursorSize {
		c.LastDeviceMS = int64(binary.BigEndian.Uint64(v[1+8*8:]))
	}
	return nil
}

// trendItems is the number of points a trend record holds.
func trendItems(k, v []byte) int64 {
	if _, _, n, err := recordSpan(k, v); err == nil {
		return int64(n)
	}
	return 0
}

// ledgerItems is the number of messages a ledger record stands for.
func ledgerItems(k, v []byte) int64 {
	var r ledgerRange
	if decodeLedger(k, v, &r) != nil {
		return 0
	}
	return int64(r.count())
}

// rawItems is the number of raw chunks a raw record holds.
func rawItems(_, v []byte) int64 {
	n, _ := rawSummary(v)
	return n
}

// rawSeconds is the device-seconds of samples a raw record holds.
func rawSeconds(v []byte) float64 {
	_, s := rawSummary(v)
	return s
}
