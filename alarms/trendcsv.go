package alarms

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
)

// Trend CSV columns (CONTRACT).
var trendColumns = []string{"t_s", "device", "spo2_pct", "pulse_bpm", "pi_pct", "sqi"}

// Value columns of the trend CSV, in Sample field order after T.
const (
	tcSpO2 = iota
	tcPulse
	tcPI
	tcSQI
	numTrendValues
)

// trendValueNames and trendValueBounds: the value columns and their bounds
// (a value outside is an error; spo2_pct 0 means "no reading" and is kept as
// missing).
var (
	trendValueNames  = [numTrendValues]string{"spo2_pct", "pulse_bpm", "pi_pct", "sqi"}
	trendValueBounds = [numTrendValues][2]float64{{0, 100}, {0, 350}, {0, 100}, {0, 1}}
)

// ReadTrendCSV reads the replay/tune trend format:
// t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi with a header row (columns in any
// order; t_s and spo2_pct required, the others optional, unknown columns
// ignored). Empty cells are missing values; an empty or absent device is the
// stream "". Lines starting with '#' (the caution line) and empty lines are
// skipped. Rows of different devices may interleave; each device's times
// must increase. Devices are returned in order of first appearance. Errors
// name the line, the column and the bound.
//
// It reads RFC 4180 CSV exactly like encoding/csv, but without allocating
// per cell: lines without quotes or stray carriage returns (everything the
// project writes) are split in place and their numbers parsed from the
// bytes; from the first line that needs it on, encoding/csv reads the rest.
func ReadTrendCSV(r io.Reader) ([]Trend, error) {
	tr := &trendReader{byDev: map[string]int{}, last: -1}
	br := bufio.NewReaderSize(r, 64<<10)
	line, end, err := tr.seq(br, 0, true)
	if err != nil {
		return nil, err
	}
	if !end {
		if err := tr.blocks(br, line); err != nil {
			return nil, err
		}
	}
	return tr.end()
}

// seq reads br line by line from line+1 on: up to and including the
// header when headerOnly, else to the end of the input. It reports the
// last line read and whether the input has ended.
func (tr *trendReader) seq(br *bufio.Reader, line int, headerOnly bool) (int, bool, error) {
	var long []byte // a line longer than br's buffer
	for {
		if headerOnly && tr.header {
			return line, false, nil
		}
		b, err := br.ReadSlice('\n')
		if errors.Is(err, bufio.ErrBufferFull) {
			long = append(long[:0], b...)
			for errors.Is(err, bufio.ErrBufferFull) {
				b, err = br.ReadSlice('\n')
				long = append(long, b...)
			}
			b = long
		}
		if err != nil && !errors.Is(err, io.EOF) {
			return line, true, fmt.Errorf("trend csv: %w", err)
		}
		if len(b) == 0 && err != nil {
			return line, true, nil
		}
		line++
		body := b
		if n := len(body); n > 0 && body[n-1] == '\n' {
			body = body[:n-1]
			if n := len(body); n > 0 && body[n-1] == '\r' {
				body = body[:n-1]
			}
		}
		if len(body) > 0 && body[0] != '#' {
			if bytes.IndexByte(body, '"') >= 0 || bytes.IndexByte(body, '\r') >= 0 {
				// encoding/csv reads this line and the rest.
				return line, true, tr.finishStd(io.MultiReader(bytes.NewReader(append([]byte(nil), b...)), br), line-1)
			}
			if e := tr.fastRecord(body, line); e != nil {
				return line, true, e
			}
		}
		if err != nil {
			return line, true, nil
		}
	}
}

// trendBlock is the size of the blocks of lines parsed in parallel.
var trendBlock = 4 << 20 // a variable for the tests

// blocks reads the rows after the header (line is the header's) in blocks
// of whole lines, parses up to GOMAXPROCS blocks at once, each into its own
// trends, and appends those to tr's in input order, checking that times
// still increase across blocks. While one round of blocks is parsed, the
// next is read (into a second set of buffers). Errors are those of a
// line-by-line read: the first line at fault in the input. A block with a
// quote or a carriage return goes, with everything after it, to seq.
func (tr *trendReader) blocks(br *bufio.Reader, line int) error {
	workers := max(1, runtime.GOMAXPROCS(0))
	rd := &blockReader{br: br, size: min(trendBlock, 256<<10)}
	var bufs [2][][]byte
	for k := range bufs {
		bufs[k] = make([][]byte, workers)
	}
	parts := make([]*trendReader, workers)
	cur := rd.round(bufs[0])
	for set := 0; ; set ^= 1 {
		if cur.err != nil {
			return cur.err
		}
		if cur.long { // a line longer than a block
			return tr.seqRest(io.MultiReader(bytes.NewReader(slicesConcat(cur.blocks, nil)), br), line)
		}
		blocks := cur.blocks
		slow := len(blocks)
		for k, b := range blocks {
			if bytes.IndexByte(b, '"') >= 0 || bytes.IndexByte(b, '\r') >= 0 {
				slow = k
				break
			}
		}
		var wg sync.WaitGroup
		for k := range blocks[:slow] {
			p := &trendReader{}
			parts[k] = p
			p.reset(tr)
			wg.Go(func() { p.parseBlock(blocks[k]) })
		}
		var next blockRound
		if slow == len(blocks) && !cur.eof {
			next = rd.round(bufs[set^1]) // read ahead while the blocks parse
		}
		wg.Wait()
		for k := range blocks[:slow] {
			if err := tr.merge(parts[k], line); err != nil {
				return err
			}
			line += bytes.Count(blocks[k], []byte{'\n'})
		}
		if slow < len(blocks) {
			rest := io.MultiReader(bytes.NewReader(slicesConcat(blocks[slow:], rd.carry)), br)
			return tr.seqRest(rest, line)
		}
		if cur.eof {
			tr.assemble()
			return nil
		}
		cur = next
	}
}

// blockReader reads blocks of whole lines for blocks: each ends at a
// line's end, the part line after it is carried into the next block.
// Blocks start small and double up to trendBlock, so a small input does
// not pay for large buffers.
type blockReader struct {
	br    *bufio.Reader
	carry []byte
	size  int
}

// blockRound is one read of blockReader: up to one block per worker.
type blockRound struct {
	blocks [][]byte
	eof    bool  // the input ended with the last block
	long   bool  // a line is longer than a block: blocks hold all that was read, carry included
	err    error // a read error
}

// round reads up to len(bufs) blocks, each into its buffer of bufs
// (replaced when too small).
func (rd *blockReader) round(bufs [][]byte) blockRound {
	var r blockRound
	for len(r.blocks) < len(bufs) && !r.eof {
		k := len(r.blocks)
		if len(bufs[k]) < rd.size || len(rd.carry) >= rd.size {
			bufs[k] = make([]byte, max(rd.size, 2*len(rd.carry)))
		}
		buf := bufs[k]
		c := copy(buf, rd.carry)
		n, err := io.ReadFull(rd.br, buf[c:])
		n += c
		switch {
		case errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF):
			r.eof = true
			rd.carry = nil
			if n > 0 {
				r.blocks = append(r.blocks, buf[:n])
			}
			continue
		case err != nil:
			r.err = fmt.Errorf("trend csv: %w", err)
			return r
		}
		nl := bytes.LastIndexByte(buf[:n], '\n')
		if nl < 0 {
			r.blocks, r.long, rd.carry = append(r.blocks, buf[:n]), true, nil
			return r
		}
		rd.carry = append(rd.carry[:0], buf[nl+1:n]...)
		r.blocks = append(r.blocks, buf[:nl+1])
	}
	rd.size = min(trendBlock, 2*rd.size)
	return r
}

// seqRest reads the rest of the input line by line after line.
func (tr *trendReader) seqRest(r io.Reader, line int) error {
	tr.assemble()
	_, _, err := tr.seq(bufio.NewReaderSize(r, 1<<20), line, false)
	return err
}

// slicesConcat is the concatenation of bs and last, copied.
func slicesConcat(bs [][]byte, last []byte) []byte {
	var out []byte
	for _, b := range bs {
		out = append(out, b...)
	}
	return append(out, last...)
}

// reset makes p an empty block parser with the columns of tr.
func (p *trendReader) reset(tr *trendReader) {
	*p = trendReader{header: true, tCol: tr.tCol, devCol: tr.devCol, valCol: tr.valCol,
		byDev: map[string]int{}, last: -1, block: true}
}

// parseBlock parses the lines of b (whole lines, no quotes, no carriage
// returns), numbering them from 1, up to the first error (kept in p.err).
func (p *trendReader) parseBlock(b []byte) {
	rows := bytes.Count(b, []byte{'\n'}) + 1
	p.flat = make([]Sample, 0, rows)
	p.flatDev = make([]int32, 0, rows)
	line := 0
	for len(b) > 0 {
		i := bytes.IndexByte(b, '\n')
		body := b
		if i >= 0 {
			body, b = b[:i], b[i+1:]
		} else {
			b = nil
		}
		line++
		if len(body) == 0 || body[0] == '#' {
			continue
		}
		if err := p.fastRecord(body, line); err != nil {
			p.err = err
			return
		}
	}
}

// merge takes block p's rows (its lines numbered after line) after
// those merged so far, checking that each device's times still increase;
// assemble copies them into the trends.
func (tr *trendReader) merge(p *trendReader, line int) error {
	var first *rowError
	p.toG = p.toG[:0]
	for d := range p.trends {
		name := p.trends[d].Device
		g, ok := tr.byDev[name]
		if !ok {
			g = len(tr.trends)
			tr.byDev[name] = g
			tr.trends = append(tr.trends, Trend{Device: name})
		}
		for len(tr.gLast) < len(tr.trends) {
			tr.gLast = append(tr.gLast, math.NaN())
			tr.gCount = append(tr.gCount, 0)
		}
		p.toG = append(p.toG, g)
		if tr.gCount[g] > 0 && !(p.first[d].t > tr.gLast[g]) {
			f := p.first[d]
			if first == nil || f.line < first.line {
				first = &rowError{line: f.line, msg: fmt.Sprintf("t_s %s for device %q, want after %s (times must increase per device)",
					f.ts, name, strconv.FormatFloat(tr.gLast[g], 'f', -1, 64))}
			}
		}
	}
	if re, ok := p.err.(*rowError); ok && (first == nil || re.line < first.line) {
		first = re
	} else if p.err != nil && !ok {
		return p.err
	}
	if first != nil {
		return &rowError{line: first.line + line, msg: first.msg}
	}
	p.off = p.off[:0]
	for d, g := range p.toG {
		p.off = append(p.off, tr.gCount[g])
		if p.count[d] > 0 {
			tr.gLast[g] = p.lastT[d]
			tr.gCount[g] += p.count[d]
		}
	}
	tr.done = append(tr.done, p)
	tr.last = -1
	return nil
}

// assemble gives each trend the rows of the merged blocks. A trend whose
// rows are one run of consecutive rows of one block keeps them where they
// are (a file written device after device copies little); the others get
// a slice sized once for all their rows, and the blocks copy their rows
// into it in parallel, each at its offset. Fresh memory is slow to touch
// on the small machines tune runs on, so touching less of it, on every
// core, is most of the gain.
func (tr *trendReader) assemble() {
	blocks := make([]int, len(tr.trends)) // per trend: the blocks with rows of it
	for _, p := range tr.done {
		for d, g := range p.toG {
			if p.count[d] > 0 {
				blocks[g]++
			}
		}
	}
	for _, p := range tr.done {
		p.alias = p.alias[:0]
		for d, g := range p.toG {
			alias := blocks[g] == 1 && p.contig[d]
			p.alias = append(p.alias, alias)
			if alias {
				lo := p.start[d]
				tr.trends[g].Samples = p.flat[lo : lo+p.count[d] : lo+p.count[d]]
			}
		}
	}
	for g := range tr.trends {
		if blocks[g] > 1 || (blocks[g] == 1 && tr.trends[g].Samples == nil) {
			tr.trends[g].Samples = make([]Sample, tr.gCount[g])
		}
	}
	var next atomic.Int64
	var wg sync.WaitGroup
	for range min(len(tr.done), max(1, runtime.GOMAXPROCS(0))) {
		wg.Go(func() {
			for k := int(next.Add(1) - 1); k < len(tr.done); k = int(next.Add(1) - 1) {
				tr.done[k].copyRows(tr.trends)
			}
		})
	}
	wg.Wait()
	tr.done = nil
	clear(tr.gCount)
}

// copyRows copies the rows of merged block p that are not kept in place
// into their trends, each at p's offset in its trend: one copy per trend
// whose rows are consecutive, else row by row.
func (p *trendReader) copyRows(trends []Trend) {
	scatter := false
	for d, g := range p.toG {
		switch {
		case p.alias[d] || p.count[d] == 0:
		case p.contig[d]:
			lo := p.start[d]
			copy(trends[g].Samples[p.off[d]:], p.flat[lo:lo+p.count[d]])
		default:
			scatter = true
		}
	}
	if !scatter {
		return
	}
	pos := p.off
	for j := range p.flat {
		d := p.flatDev[j]
		if p.contig[d] {
			continue
		}
		trends[p.toG[d]].Samples[pos[d]] = p.flat[j]
		pos[d]++
	}
}

// rowError is an error of one row: "trend csv: line N: msg".
type rowError struct {
	line int
	msg  string
}

func (e *rowError) Error() string { return fmt.Sprintf("trend csv: line %d: %s", e.line, e.msg) }

// fastRecord splits line (no quotes) at commas in place and takes it as a
// record; only the ends of the fields are kept (no pointers, so no write
// barriers), and the header goes the general way.
func (tr *trendReader) fastRecord(line []byte, n int) error {
	if !tr.header {
		tr.fields = splitComma(tr.fields[:0], line)
		return tr.record(tr.fields, n)
	}
	ends := tr.ends[:0]
	for off := 0; ; {
		i := bytes.IndexByte(line[off:], ',')
		if i < 0 {
			ends = append(ends, len(line))
			break
		}
		off += i
		ends = append(ends, off)
		off++
	}
	tr.ends = ends
	cell := func(i int) []byte {
		if i < 0 || i >= len(ends) {
			return nil
		}
		lo := 0
		if i > 0 {
			lo = ends[i-1] + 1
		}
		return trimSpace(line[lo:ends[i]])
	}
	var cells [2 + numTrendValues][]byte
	cells[0], cells[1] = cell(tr.tCol), cell(tr.devCol)
	for k := range numTrendValues {
		cells[2+k] = cell(tr.valCol[k])
	}
	return tr.sample(&cells, n)
}

// splitComma appends the comma-separated fields of line to dst.
func splitComma(dst [][]byte, line []byte) [][]byte {
	for {
		i := bytes.IndexByte(line, ',')
		if i < 0 {
			return append(dst, line)
		}
		dst = append(dst, line[:i])
		line = line[i+1:]
	}
}

// trendReader is ReadTrendCSV's state.
type trendReader struct {
	header bool // the header has been read
	tCol   int
	devCol int // -1 when absent
	valCol [numTrendValues]int
	fields [][]byte
	ends   []int

	trends  []Trend
	byDev   map[string]int
	block   bool           // parsing one block of a parallel read: first is kept
	first   []firstRow     // per trend: its first row (block only)
	err     error          // the block's first error
	lastT   []float64      // block: per trend, the time of its last row
	count   []int          // block: per trend, its rows
	flat    []Sample       // block: the rows in input order
	flatDev []int32        // block: each row's trend
	start   []int          // block: per trend, the index in flat of its first row
	contig  []bool         // block: per trend, its rows are consecutive in flat
	toG     []int          // block, after merge: each trend's index in the whole read
	off     []int          // block, after merge: per trend, its first row's index in the whole trend
	alias   []bool         // block, in assemble: per trend, its rows stay in flat
	done    []*trendReader // whole read: merged blocks waiting for assemble
	gLast   []float64      // whole read: per trend, the time of its last merged row
	gCount  []int          // whole read: per trend, its merged rows
	last    int            // index of the previous row's device, -1 before any
	lastDev []byte
}

// firstRow is where a block's trend starts: its line and t_s as written.
type firstRow struct {
	line int
	ts   string
	t    float64
}

// finishStd reads the rest of the input with encoding/csv; off is the
// number of lines already read before rest.
func (tr *trendReader) finishStd(rest io.Reader, off int) error {
	cr := csv.NewReader(rest)
	cr.FieldsPerRecord = -1
	cr.ReuseRecord = true
	cr.Comment = '#'
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			var pe *csv.ParseError
			if errors.As(err, &pe) {
				pe.StartLine += off
				pe.Line += off
			}
			if !tr.header {
				return fmt.Errorf("trend csv: header: %w", err)
			}
			return fmt.Errorf("trend csv: %w", err)
		}
		line, _ := cr.FieldPos(0)
		tr.fields = tr.fields[:0]
		for _, f := range rec {
			tr.fields = append(tr.fields, []byte(f))
		}
		if err := tr.record(tr.fields, line+off); err != nil {
			return err
		}
	}
	return nil
}

func (tr *trendReader) end() ([]Trend, error) {
	if !tr.header {
		return nil, errors.New("trend csv: empty input, want a header row t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi")
	}
	return tr.trends, nil
}

// record takes one CSV record (the header first) read at line.
func (tr *trendReader) record(rec [][]byte, line int) error {
	if !tr.header {
		return tr.readHeader(rec)
	}
	cell := func(i int) []byte {
		if i >= 0 && i < len(rec) {
			return trimSpace(rec[i])
		}
		return nil
	}
	var cells [2 + numTrendValues][]byte
	cells[0], cells[1] = cell(tr.tCol), cell(tr.devCol)
	for k := range numTrendValues {
		cells[2+k] = cell(tr.valCol[k])
	}
	return tr.sample(&cells, line)
}

// sample takes one row's cells: t_s, device, then the values.
func (tr *trendReader) sample(cells *[2 + numTrendValues][]byte, line int) error {
	ts := cells[0]
	t, ok := parseFloat(ts)
	if !ok || math.IsNaN(t) || math.IsInf(t, 0) {
		return &rowError{line, fmt.Sprintf("t_s %q, want a finite number of seconds", ts)}
	}
	var vals [numTrendValues]float64
	for k := range vals {
		vals[k] = math.NaN()
		c := cells[2+k]
		if len(c) == 0 {
			continue
		}
		v, ok := parseFloat(c)
		b := trendValueBounds[k]
		if !ok || !(v >= b[0] && v <= b[1]) {
			return &rowError{line, fmt.Sprintf("%s %q, want a number in [%g, %g] or empty", trendValueNames[k], c, b[0], b[1])}
		}
		vals[k] = v
	}
	dev := cells[1]
	i := tr.last
	if i < 0 || !bytes.Equal(dev, tr.lastDev) {
		var ok bool
		if i, ok = tr.byDev[string(dev)]; !ok {
			i = len(tr.trends)
			tr.byDev[string(dev)] = i
			tr.trends = append(tr.trends, Trend{Device: string(dev)})
			if tr.block {
				tr.first = append(tr.first, firstRow{line, string(ts), t})
				tr.start = append(tr.start, len(tr.flat))
				tr.contig = append(tr.contig, true)
				tr.lastT = append(tr.lastT, t)
				tr.count = append(tr.count, 0)
			}
		}
		tr.last = i
		tr.lastDev = append(tr.lastDev[:0], dev...)
	}
	trend := &tr.trends[i]
	if tr.block {
		// Flat rows in input order with their device, in a buffer sized
		// for the block: no slice grows while parsing (assemble copies
		// each row once into its device's exactly sized trend).
		if tr.count[i] > 0 && !(t > tr.lastT[i]) {
			return &rowError{line, fmt.Sprintf("t_s %s for device %q, want after %s (times must increase per device)",
				ts, trend.Device, strconv.FormatFloat(tr.lastT[i], 'f', -1, 64))}
		}
		if n := len(tr.flatDev); tr.count[i] > 0 && tr.flatDev[n-1] != int32(i) {
			tr.contig[i] = false
		}
		tr.flat = append(tr.flat, Sample{T: t, SpO2: vals[tcSpO2], Pulse: vals[tcPulse], PI: vals[tcPI], SQI: vals[tcSQI]})
		tr.flatDev = append(tr.flatDev, int32(i))
		tr.lastT[i] = t
		tr.count[i]++
		return nil
	}
	if n := len(trend.Samples); n > 0 && !(t > trend.Samples[n-1].T) {
		return &rowError{line, fmt.Sprintf("t_s %s for device %q, want after %s (times must increase per device)",
			ts, trend.Device, strconv.FormatFloat(trend.Samples[n-1].T, 'f', -1, 64))}
	}
	trend.Samples = append(trend.Samples, Sample{T: t, SpO2: vals[tcSpO2], Pulse: vals[tcPulse], PI: vals[tcPI], SQI: vals[tcSQI]})
	return nil
}

func (tr *trendReader) readHeader(rec [][]byte) error {
	col := map[string]int{}
	for i, h := range rec {
		name := strings.TrimSpace(strings.TrimPrefix(string(h), "\ufeff"))
		if _, dup := col[name]; dup {
			return fmt.Errorf("trend csv: header: column %q twice", name)
		}
		col[name] = i
	}
	for _, need := range []string{"t_s", "spo2_pct"} {
		if _, ok := col[need]; !ok {
			return fmt.Errorf("trend csv: header: no %s column, want %s", need, strings.Join(trendColumns, ","))
		}
	}
	idx := func(name string) int {
		if i, ok := col[name]; ok {
			return i
		}
		return -1
	}
	tr.tCol, tr.devCol = idx("t_s"), idx("device")
	for k, name := range trendValueNames {
		tr.valCol[k] = idx(name)
	}
	tr.header = true
	return nil
}

// trimSpace is bytes.TrimSpace without a call for the usual cell that has
// no space at either end.
func trimSpace(b []byte) []byte {
	if len(b) == 0 || (b[0] > ' ' && b[0] < 0x80 && b[len(b)-1] > ' ' && b[len(b)-1] < 0x80) {
		return b
	}
	return bytes.TrimSpace(b)
}
