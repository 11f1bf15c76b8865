package uplink

import (
	"bufio"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"os"
	"path/filepath"
	"time"
)

// The spool is one append-only file, DIR/uplink.spool, of records
//
//	[u32 length][u32 CRC-32C of payload][payload]
//
// (big-endian), where the payload's first byte is its kind:
//
//	'M' meta: the owner's description (JSON), first record of the file
//	'D' data: uvarint seq, uvarint samples, uvarint mark length, mark, message (protobuf)
//	'A' finished: uvarint N: every message up to N is acknowledged or finally rejected
//	'W' welcomed: a gateway has welcomed this client once (numbering is settled)
//	'R' renumbered: uvarint from, uvarint to: messages numbered from `from` on now start at `to`
//	'P' position: the mark of the latest message ever added (kept through rewrites)
//
// A torn or corrupt record (a crash in the middle of a write) ends the file:
// it and anything after it are cut off when the spool is opened. Appends go
// to the page cache at once (a killed process loses nothing) and are synced
// to the disk at most syncEvery apart and on Close (a power cut may lose the
// last syncEvery). When the acknowledged part dominates, the file is
// rewritten with only what is still held (temporary file, sync, rename).
const (
	spoolName = "uplink.spool"
	syncEvery = 200 * time.Millisecond
	maxRecord = 16 << 20
)

var crcTable = crc32.MakeTable(crc32.Castagnoli)

type spool struct {
	path     string
	f        *os.File
	size     int64
	lastSync time.Time
	dirty    bool
	scratch  []byte
}

// recovered is what a spool held when it was opened.
type recovered struct {
	meta     []byte
	welcomed bool
	finished uint64
	items    []*item // seq order, all above finished
	lastMark []byte
	lastSeq  uint64 // highest sequence number ever written
	cut      int64  // bytes of a torn tail that were cut off
}

// openSpool opens or creates the spool in dir; meta is written to a new one.
func openSpool(dir string, meta []byte) (*spool, *recovered, error) {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, nil, fmt.Errorf("spool: %w", err)
	}
	path := filepath.Join(dir, spoolName)
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o644)
	if err != nil {
		return nil, nil, fmt.Errorf("spool: %w", err)
	}
	s := &spool{path: path, f: f}
	rec, err := s.load()
	if err != nil {
		f.Close()
		return nil, nil, err
	}
	if rec.meta == nil {
		if err := s.append('M', meta); err != nil {
			f.Close()
			return nil, nil, err
		}
		rec.meta = meta
		if err := s.sync(); err != nil {
			f.Close()
			return nil, nil, err
		}
	}
	return s, rec, nil
}

// load scans the file, cuts a torn tail and returns what it holds.
func (s *spool) load() (*recovered, error) {
	rec := &recovered{}
	if _, err := s.f.Seek(0, io.SeekStart); err != nil {
		return nil, fmt.Errorf("spool: %w", err)
	}
	r := bufio.NewReaderSize(s.f, 256<<10)
	var off int64
	held := map[uint64]*item{}
	var hdr [8]byte
	for {
		if _, err := io.ReadFull(r, hdr[:]); err != nil {
			break
		}
		n := binary.BigEndian.Uint32(hdr[:4])
		if n == 0 || n > maxRecord {
			break
		}
		p := make([]byte, n)
		if _, err := io.ReadFull(r, p); err != nil {
			break
		}
		if crc32.Checksum(p, crcTable) != binary.BigEndian.Uint32(hdr[4:]) {
			break
		}
		if err := rec.apply(p, off+8, held); err != nil {
			break
		}
		off += 8 + int64(n)
	}
	fi, err := s.f.Stat()
	if err != nil {
		return nil, fmt.Errorf("spool: %w", err)
	}
	if fi.Size() > off {
		rec.cut = fi.Size() - off
		if err := s.f.Truncate(off); err != nil {
			return nil, fmt.Errorf("spool: cut torn tail: %w", err)
		}
	}
	if _, err := s.f.Seek(off, io.SeekStart); err != nil {
		return nil, fmt.Errorf("spool: %w", err)
	}
	s.size = off
	for seq, it := range held {
		if seq > rec.finished {
			rec.items = append(rec.items, it)
		}
	}
	sortItems(rec.items)
	return rec, nil
}

// apply folds one record (payload p at file offset off) into rec.
func (rec *recovered) apply(p []byte, off int64, held map[uint64]*item) error {
	kind, b := p[0], p[1:]
	switch kind {
	case 'M':
		rec.meta = append([]byte(nil), b...)
	case 'W':
		rec.welcomed = true
	case 'A':
		v, n := binary.Uvarint(b)
		if n <= 0 {
			return errors.New("bad ack")
		}
		rec.finished = max(rec.finished, v)
		for seq := range held {
			if seq <= rec.finished {
				delete(held, seq)
			}
		}
	case 'R':
		from, n := binary.Uvarint(b)
		if n <= 0 {
			return errors.New("bad renumber")
		}
		to, m := binary.Uvarint(b[n:])
		if m <= 0 {
			return errors.New("bad renumber")
		}
		moved := map[uint64]*item{}
		for seq, it := range held {
			if seq >= from {
				delete(held, seq)
				it.seq = seq - from + to
				moved[it.seq] = it
			}
		}
		for seq, it := range moved {
			held[seq] = it
		}
		if rec.lastSeq >= from {
			rec.lastSeq = rec.lastSeq - from + to
		}
	case 'P':
		rec.lastMark = append([]byte(nil), b...)
	case 'D':
		seq, n1 := binary.Uvarint(b)
		if n1 <= 0 {
			return errors.New("bad data")
		}
		samples, n2 := binary.Uvarint(b[n1:])
		if n2 <= 0 {
			return errors.New("bad data")
		}
		ml, n3 := binary.Uvarint(b[n1+n2:])
		if n3 <= 0 || int(ml) > len(b)-n1-n2-n3 {
			return errors.New("bad data")
		}
		h := n1 + n2 + n3
		mark := append([]byte(nil), b[h:h+int(ml)]...)
		body := h + int(ml)
		it := &item{seq: seq, samples: int(samples), mark: mark, off: off + 1 + int64(body), n: len(b) - body}
		rec.lastMark = mark
		rec.lastSeq = max(rec.lastSeq, seq)
		if seq > rec.finished {
			held[seq] = it
		}
	default:
		return fmt.Errorf("unknown record kind %q", kind)
	}
	return nil
}

func sortItems(items []*item) {
	for i := 1; i < len(items); i++ {
		for j := i; j > 0 && items[j].seq < items[j-1].seq; j-- {
			items[j], items[j-1] = items[j-1], items[j]
		}
	}
}

// append writes one record; it returns the file offset of the payload's
// second byte (after the kind).
func (s *spool) append(kind byte, body ...[]byte) error {
	_, err := s.appendAt(kind, body...)
	return err
}

func (s *spool) appendAt(kind byte, body ...[]byte) (int64, error) {
	n := 1
	for _, b := range body {
		n += len(b)
	}
	buf := s.scratch[:0]
	buf = binary.BigEndian.AppendUint32(buf, uint32(n))
	buf = append(buf, 0, 0, 0, 0, kind)
	for _, b := range body {
		buf = append(buf, b...)
	}
	binary.BigEndian.PutUint32(buf[4:8], crc32.Checksum(buf[8:], crcTable))
	s.scratch = buf
	if _, err := s.f.Write(buf); err != nil {
		return 0, fmt.Errorf("spool: write: %w", err)
	}
	at := s.size + 9
	s.size += int64(len(buf))
	s.dirty = true
	if time.Since(s.lastSync) >= syncEvery {
		if err := s.sync(); err != nil {
			return 0, err
		}
	}
	return at, nil
}

func (s *spool) sync() error {
	if !s.dirty {
		return nil
	}
	if err := s.f.Sync(); err != nil {
		return fmt.Errorf("spool: sync: %w", err)
	}
	s.dirty, s.lastSync = false, time.Now()
	return nil
}

// addData appends a data message and sets it.off and it.n.
func (s *spool) addData(it *item, msg []byte) error {
	var h []byte
	h = binary.AppendUvarint(h, it.seq)
	h = binary.AppendUvarint(h, uint64(it.samples))
	h = binary.AppendUvarint(h, uint64(len(it.mark)))
	h = append(h, it.mark...)
	at, err := s.appendAt('D', h, msg)
	if err != nil {
		return err
	}
	it.off, it.n = at+int64(len(h)), len(msg)
	return nil
}

func (s *spool) finished(through uint64) error {
	return s.append('A', binary.AppendUvarint(nil, through))
}

func (s *spool) renumbered(from, to uint64) error {
	b := binary.AppendUvarint(nil, from)
	return s.append('R', binary.AppendUvarint(b, to))
}

// read returns the message bytes of a spooled item.
func (s *spool) read(it *item) ([]byte, error) {
	b := make([]byte, it.n)
	if _, err := s.f.ReadAt(b, it.off); err != nil {
		return nil, fmt.Errorf("spool: read message %d: %w", it.seq, err)
	}
	return b, nil
}

// rewrite replaces the file by one holding only meta, the welcome flag, the
// finished mark, the last position and the held items.
func (s *spool) rewrite(meta []byte, welcomed bool, finished uint64, lastMark []byte, items []*item) error {
	tmp := s.path + ".tmp"
	nf, err := os.OpenFile(tmp, os.O_RDWR|os.O_CREATE|os.O_TRUNC, 0o644)
	if err != nil {
		return fmt.Errorf("spool: rewrite: %w", err)
	}
	ns := &spool{path: s.path, f: nf, lastSync: time.Now()}
	fail := func(err error) error {
		nf.Close()
		os.Remove(tmp)
		return fmt.Errorf("spool: rewrite: %w", err)
	}
	if err := ns.append('M', meta); err != nil {
		return fail(err)
	}
	if welcomed {
		if err := ns.append('W'); err != nil {
			return fail(err)
		}
	}
	if err := ns.finished(finished); err != nil {
		return fail(err)
	}
	if err := ns.append('P', lastMark); err != nil {
		return fail(err)
	}
	offs := make([]int64, len(items))
	for i, it := range items {
		msg, err := s.read(it)
		if err != nil {
			return fail(err)
		}
		cp := *it
		if err := ns.addData(&cp, msg); err != nil {
			return fail(err)
		}
		offs[i] = cp.off
	}
	ns.dirty = true
	if err := ns.sync(); err != nil {
		return fail(err)
	}
	if err := os.Rename(tmp, s.path); err != nil {
		return fail(err)
	}
	if d, err := os.Open(filepath.Dir(s.path)); err == nil {
		d.Sync()
		d.Close()
	}
	s.f.Close()
	for i, it := range items {
		it.off = offs[i]
	}
	s.f, s.size, s.dirty, s.lastSync = nf, ns.size, false, ns.lastSync
	return nil
}

func (s *spool) close() error {
	err := s.sync()
	if cerr := s.f.Close(); err == nil && cerr != nil {
		err = fmt.Errorf("spool: %w", cerr)
	}
	return err
}
