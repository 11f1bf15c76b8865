package store

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/bits"

	bolt "go.etcd.io/bbolt"
)

// Raw capture blocks (format version 2):
//
//	raw/ID/DAY/FIRST_SEQ   block of consecutive chunks of one device (version 2)
//
// A block holds up to rawBlockSpanMS of a device's consecutive chunks
// (sequence numbers following one another, one sample rate, ambient
// channel present in all or none). A chunk extends the device's open block
// in the transaction that writes it: its frame is appended to the stored
// value, whose earlier bytes stay as they were. Block:
//
//	version 2 | sample rate (float64 bits, 8 bytes) | ambient (1 byte: 0 or 1) | frames
//
// Frame (one chunk): uvarint payload length | uvarint sequence step | zigzag
// varint (device time step - expected step) | uvarint samples per channel |
// per channel one byte: predictor order (bits 5-6) and Rice parameter
// (bits 0-4) | payload: the channels' residuals, Rice-coded, MSB first,
// padded to a byte. The predictor is FLAC's fixed polynomial of order 0-3
// over the channel's samples, running on from the previous frame of the
// block (the first frame starts from zeros); the encoder picks the order
// and parameter with the fewest bits per channel and frame. A residual
// whose quotient reaches 24 is written as 24 ones, a 0, 6 bits of length L
// and L bits of its zigzag value. Samples come back exactly: the coding is
// lossless at whatever resolution the device declared (a 16-bit device's
// samples never need more than the bits of their residuals). The first
// frame's sequence step is 0 (its sequence number is the key) and its time
// step is its device time.

const (
	vRawBlock      = 2
	rawBlockSpanMS = 10_000   // a block covers at most 10 s of device time
	rawBlockBytes  = 32 << 10 // and at most 32 KiB (noisy signals code larger)
	riceEscape     = 24
)

// rawState is what a device's open block needs to take the next chunk.
type rawState struct {
	day      uint32
	key      []byte // the block's key (first sequence number)
	size     int    // bytes of the stored value
	lastSeq  uint64
	firstDev int64
	lastDev  int64
	lastN    int // samples per channel of the last chunk
	rate     float64
	ambient  bool
	hist     [3][3]int64 // per channel the last three samples, newest first
}

// expectedStep is the device time a chunk of n samples at rate covers, ms.
func expectedStep(n int, rate float64) int64 {
	if rate <= 0 {
		return 0
	}
	return int64(math.Round(float64(n) * 1000 / rate))
}

// rawWriter applies one batch's raw captures; open blocks reach db.rawOpen
// only when the transaction commits.
type rawWriter struct {
	db      *DB
	tx      *bolt.Tx
	pending map[string]*rawState
}

func (w *rawWriter) add(r *RawCapture) error {
	if len(r.Red) != len(r.IR) || (len(r.Ambient) != 0 && len(r.Ambient) != len(r.Red)) {
		return fmt.Errorf("raw capture %q seq %d: channels of %d, %d and %d samples", r.Device, r.Seq, len(r.Red), len(r.IR), len(r.Ambient))
	}
	day := dayOf(r.DeviceTimeMS)
	bk, err := nested(w.tx, bRaw, []byte(r.Device), u32(day))
	if err != nil {
		return err
	}
	bk.FillPercent = 0.9 // blocks are appended in key order: pack pages instead of splitting them in half
	st := w.pending[r.Device]
	if st == nil {
		if prev, ok := w.db.rawOpen[r.Device]; ok {
			cp := *prev
			st = &cp
		}
	}
	amb := len(r.Ambient) > 0
	var old []byte
	if st != nil && st.day == day && st.rate == r.RateHz && st.ambient == amb && st.lastSeq != math.MaxUint64 && r.Seq == st.lastSeq+1 &&
		r.DeviceTimeMS >= st.lastDev && r.DeviceTimeMS-st.firstDev < rawBlockSpanMS && st.size < rawBlockBytes {
		// The stored value must be the block this state describes (a
		// block dropped by retention, or changed by another writer, is not
		// extended).
		if v := bk.Get(st.key); v != nil && len(v) == st.size && v[0] == vRawBlock {
			old = v
		}
	}
	if old == nil {
		st = &rawState{day: day, key: u64(r.Seq), rate: r.RateHz, ambient: amb, lastSeq: r.Seq, firstDev: r.DeviceTimeMS, lastDev: r.DeviceTimeMS}
		if bk.Get(st.key) != nil {
			// A capture of this sequence number is stored already (a
			// message written again): keep the first, as the trend does.
			return nil
		}
		old = make([]byte, 0, 10)
		old = append(old, vRawBlock)
		old = binary.BigEndian.AppendUint64(old, math.Float64bits(r.RateHz))
		if amb {
			old = append(old, 1)
		} else {
			old = append(old, 0)
		}
	}
	seqStep := r.Seq - st.lastSeq
	timeStep := r.DeviceTimeMS - st.lastDev - expectedStep(st.lastN, st.rate)
	if len(old) == 10 { // first frame
		seqStep, timeStep = 0, r.DeviceTimeMS
	}
	chans := [][]uint32{r.Red, r.IR}
	if amb {
		chans = append(chans, r.Ambient)
	}
	frame := encodeFrame(seqStep, timeStep, chans, &st.hist)
	v := make([]byte, 0, len(old)+len(frame))
	v = append(append(v, old...), frame...)
	if err := bk.Put(st.key, v); err != nil {
		return err
	}
	st.size, st.lastSeq, st.lastDev, st.lastN = len(v), r.Seq, r.DeviceTimeMS, len(r.Red)
	w.pending[r.Device] = st
	return nil
}

// commit keeps the batch's open blocks. Caller holds writeMu.
func (w *rawWriter) commit() {
	if w == nil {
		return
	}
	for d, st := range w.pending {
		w.db.rawOpen[d] = st
	}
}

// predict is FLAC's fixed polynomial predictor of order 0-3 from the last
// three samples (h[0] newest).
func predict(order int, h *[3]int64) int64 {
	switch order {
	case 1:
		return h[0]
	case 2:
		return 2*h[0] - h[1]
	case 3:
		return 3*h[0] - 3*h[1] + h[2]
	}
	return 0
}

func zigzag(x int64) uint64   { return uint64((x << 1) ^ (x >> 63)) }
func unzigzag(u uint64) int64 { return int64(u>>1) ^ -int64(u&1) }

// riceBits is the length of u Rice-coded with parameter k.
func riceBits(u uint64, k uint) int {
	if q := u >> k; q < riceEscape {
		return int(q) + 1 + int(k)
	}
	return riceEscape + 1 + 6 + bits.Len64(u)
}

// encodeFrame codes one chunk's channels, advancing hist.
func encodeFrame(seqStep uint64, timeStep int64, chans [][]uint32, hist *[3][3]int64) []byte {
	n := len(chans[0])
	var bw bitWriter
	params := make([]byte, len(chans))
	for c, s := range chans {
		// Pick the order and parameter with the fewest bits.
		best, bestOrder, bestK := math.MaxInt, 0, uint(0)
		for order := 0; order <= 3; order++ {
			h := hist[c]
			var sum uint64
			res := make([]uint64, n)
			for i, x := range s {
				res[i] = zigzag(int64(x) - predict(order, &h))
				sum += res[i]
				h[2], h[1], h[0] = h[1], h[0], int64(x)
			}
			k := uint(0)
			if n > 0 && sum/uint64(n) > 0 {
				k = uint(bits.Len64(sum / uint64(n)))
				if k > 0 {
					k--
				}
			}
			for _, kk := range []uint{k, k + 1} {
				if kk > 31 {
					continue
				}
				tot := 0
				for _, u := range res {
					tot += riceBits(u, kk)
				}
				if tot < best {
					best, bestOrder, bestK = tot, order, kk
				}
			}
		}
		params[c] = byte(bestOrder<<5) | byte(bestK)
		h := &hist[c]
		for _, x := range s {
			bw.rice(zigzag(int64(x)-predict(bestOrder, h)), bestK)
			h[2], h[1], h[0] = h[1], h[0], int64(x)
		}
	}
	payload := bw.bytes()
	head := make([]byte, 0, 16+len(params))
	head = binary.AppendUvarint(head, seqStep)
	head = binary.AppendVarint(head, timeStep)
	head = binary.AppendUvarint(head, uint64(n))
	head = append(head, params...)
	out := binary.AppendUvarint(make([]byte, 0, 3+len(head)+len(payload)), uint64(len(head)+len(payload)))
	return append(append(out, head...), payload...)
}

type bitWriter struct {
	buf  []byte
	acc  uint64
	nacc uint
}

func (w *bitWriter) write(v uint64, n uint) {
	for n > 0 {
		take := min(n, 56-w.nacc)
		w.acc = w.acc<<take | (v>>(n-take))&(1<<take-1)
		w.nacc += take
		n -= take
		for w.nacc >= 8 {
			w.buf = append(w.buf, byte(w.acc>>(w.nacc-8)))
			w.nacc -= 8
		}
	}
}

func (w *bitWriter) rice(u uint64, k uint) {
	if q := u >> k; q < riceEscape {
		w.write((1<<q-1)<<1, uint(q)+1) // q ones, a zero
		w.write(u, k)
		return
	}
	w.write((1<<riceEscape-1)<<1, riceEscape+1)
	l := uint(bits.Len64(u))
	w.write(uint64(l), 6)
	w.write(u, l)
}

func (w *bitWriter) bytes() []byte {
	if w.nacc > 0 {
		w.buf = append(w.buf, byte(w.acc<<(8-w.nacc)))
		w.nacc = 0
	}
	return w.buf
}

type bitReader struct {
	b   []byte
	pos int // bit position
	err error
}

func (r *bitReader) bit() uint64 {
	if r.pos >= 8*len(r.b) {
		r.err = errBadRaw
		return 0
	}
	v := uint64(r.b[r.pos>>3]>>(7-r.pos&7)) & 1
	r.pos++
	return v
}

func (r *bitReader) read(n uint) uint64 {
	var v uint64
	for ; n > 0 && r.err == nil; n-- {
		v = v<<1 | r.bit()
	}
	return v
}

func (r *bitReader) rice(k uint) uint64 {
	q := uint64(0)
	for q < riceEscape && r.bit() == 1 && r.err == nil {
		q++
	}
	if q < riceEscape {
		return q<<k | r.read(k)
	}
	if r.bit() != 0 {
		r.err = errBadRaw
		return 0
	}
	return r.read(uint(r.read(6)))
}

var errBadRaw = errors.New("bad raw block")

// decodeRawBlock calls fn for each chunk of a version-2 block (Device left
// empty). It returns false when fn asked to stop.
func decodeRawBlock(k, v []byte, fn func(RawCapture) bool) (bool, error) {
	if len(k) != 8 || len(v) < 10 || v[0] != vRawBlock || v[9] > 1 {
		return false, fmt.Errorf("%w: header", errBadRaw)
	}
	rate := math.Float64frombits(binary.BigEndian.Uint64(v[1:]))
	nch := 2 + int(v[9])
	seq := binary.BigEndian.Uint64(k)
	var hist [3][3]int64
	var dev int64
	lastN := 0
	off := 10
	for first := true; off < len(v); first = false {
		flen, n1 := binary.Uvarint(v[off:])
		if n1 <= 0 || flen > uint64(len(v)-off-n1) {
			return false, fmt.Errorf("%w: frame length", errBadRaw)
		}
		f := v[off+n1 : off+n1+int(flen)]
		off += n1 + int(flen)
		seqStep, a := binary.Uvarint(f)
		tstep, b := binary.Varint(f[max(a, 0):])
		if a <= 0 || b <= 0 {
			return false, fmt.Errorf("%w: frame header", errBadRaw)
		}
		cnt, c := binary.Uvarint(f[a+b:])
		if c <= 0 || cnt > 1<<20 || len(f) < a+b+c+nch {
			return false, fmt.Errorf("%w: frame header", errBadRaw)
		}
		params := f[a+b+c : a+b+c+nch]
		if first {
			if seqStep != 0 {
				return false, fmt.Errorf("%w: first frame", errBadRaw)
			}
			dev = tstep
		} else {
			seq += seqStep
			dev += expectedStep(lastN, rate) + tstep
		}
		n := int(cnt)
		lastN = n
		br := bitReader{b: f[a+b+c+nch:]}
		rc := RawCapture{Seq: seq, DeviceTimeMS: dev, RateHz: rate}
		out := make([]uint32, nch*n)
		for ch := 0; ch < nch; ch++ {
			order, kk := int(params[ch]>>5), uint(params[ch]&31)
			if order > 3 {
				return false, fmt.Errorf("%w: predictor order %d", errBadRaw, order)
			}
			h := &hist[ch]
			s := out[ch*n : (ch+1)*n]
			for i := range s {
				x := predict(order, h) + unzigzag(br.rice(kk))
				if br.err != nil || x < 0 || x > math.MaxUint32 {
					return false, fmt.Errorf("%w: samples", errBadRaw)
				}
				s[i] = uint32(x)
				h[2], h[1], h[0] = h[1], h[0], x
			}
		}
		if (br.pos+7)/8 != len(br.b) {
			return false, fmt.Errorf("%w: frame of %d bytes holds %d bits", errBadRaw, len(br.b), br.pos)
		}
		rc.Red, rc.IR = out[:n:n], out[n:2*n:2*n]
		if nch == 3 {
			rc.Ambient = out[2*n:]
		}
		if !fn(rc) {
			return false, nil
		}
	}
	return true, nil
}

// decodeRawRecord calls fn for the chunks of a raw record of either version.
func decodeRawRecord(k, v []byte, fn func(RawCapture) bool) (bool, error) {
	if len(v) > 0 && v[0] == vRawBlock {
		return decodeRawBlock(k, v, fn)
	}
	if len(k) != 8 {
		return false, fmt.Errorf("bad raw record key")
	}
	r := RawCapture{Seq: binary.BigEndian.Uint64(k)}
	if err := decodeRaw(v, &r); err != nil {
		return false, err
	}
	return fn(r), nil
}

// rawSummary counts a raw record's chunks and its device-seconds of samples
// without decoding them (Stats).
func rawSummary(v []byte) (chunks int64, secs float64) {
	if len(v) >= 25 && v[0] == vRaw {
		rate := math.Float64frombits(binary.BigEndian.Uint64(v[9:]))
		if rate > 0 {
			secs = float64(binary.BigEndian.Uint32(v[17:])) / rate
		}
		return 1, secs
	}
	if len(v) < 10 || v[0] != vRawBlock {
		return 0, 0
	}
	rate := math.Float64frombits(binary.BigEndian.Uint64(v[1:]))
	for off := 10; off < len(v); {
		flen, a := binary.Uvarint(v[off:])
		if a <= 0 || flen > uint64(len(v)-off-a) {
			break
		}
		f := v[off+a : off+a+int(flen)]
		off += a + int(flen)
		_, b := binary.Uvarint(f)
		_, c := binary.Varint(f[max(b, 0):])
		if b <= 0 || c <= 0 {
			break
		}
		n, d := binary.Uvarint(f[b+c:])
		if d <= 0 {
			break
		}
		chunks++
		if rate > 0 {
			secs += float64(n) / rate
		}
	}
	return chunks, secs
}

// encodeRawBlock codes chunks of one device (ascending sequence numbers, one
// rate, ambient in all or none) as one block, as rawWriter would have made
// it a chunk at a time.
func encodeRawBlock(chunks []RawCapture) []byte {
	first := &chunks[0]
	amb := len(first.Ambient) > 0
	v := make([]byte, 0, 10)
	v = append(v, vRawBlock)
	v = binary.BigEndian.AppendUint64(v, math.Float64bits(first.RateHz))
	if amb {
		v = append(v, 1)
	} else {
		v = append(v, 0)
	}
	var hist [3][3]int64
	for i := range chunks {
		r := &chunks[i]
		seqStep, timeStep := uint64(0), r.DeviceTimeMS
		if i > 0 {
			p := &chunks[i-1]
			seqStep, timeStep = r.Seq-p.Seq, r.DeviceTimeMS-p.DeviceTimeMS-expectedStep(len(p.Red), p.RateHz)
		}
		chans := [][]uint32{r.Red, r.IR}
		if amb {
			chans = append(chans, r.Ambient)
		}
		v = append(v, encodeFrame(seqStep, timeStep, chans, &hist)...)
	}
	return v
}
