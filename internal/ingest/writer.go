package ingest

import (
	"context"
	"errors"
	"sync"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// record is one unit of work for the store writer: the effects of one data
// message, or a description/session/alarm/audit change. Everything in a record
// becomes durable in the same transaction.
type record struct {
	dev      *device       // device whose cursor the record advances (nil = none)
	stream   *stream       // stream to acknowledge (nil = none)
	seq      uint64        // data message sequence, 0 when none
	epoch    uint64        // the device's write epoch when the message was accepted (data records)
	cursor   store.Cursor  // the device's cursor after this record (when seq > 0)
	received time.Time     // arrival of the data message
	chunk    *store.Chunk  // ledger record
	points   []store.Point // trend points
	raw      *store.RawCapture
	desc     *store.Device
	session  *store.Session
	episodes []*store.Episode
	alarm    []byte // alarm-engine snapshot (nil = unchanged)
	audit    []*store.AuditEntry
	done     chan error // closed or sent when durable (sync callers)
}

var errWriterClosed = errors.New("gateway is shutting down")

// writer batches records into transactions. It is started by Serve and
// stopped by closing its input after every producer has stopped.
type writer struct {
	db      *store.DB
	in      chan *record
	maxWait time.Duration
	maxRecs int
	m       *metrics
	now     func() time.Time
	onFail  func(err error, devs map[*device]bool) // a batch did not commit; devs had data in it
	onOK    func()                                 // a batch committed
	// paced, when set (tests), is told each commit's start and end as the
	// pacing measures them.
	paced func(start, end time.Time)
	// unpaced turns pacing off (benchmarks compare).
	unpaced bool

	// carry holds the parts of failed records that are not a device's data
	// (descriptions, sessions, alarm episodes and states, audit entries):
	// they go into the next batch, so a disk-full spell does not lose an
	// alarm episode. Bounded by maxCarry; owned by run.
	carry []*record

	mu     sync.Mutex
	closed bool
}

// maxCarry bounds the records carried over failed batches (about 1 KiB each).
const maxCarry = 100_000

func newWriter(db *store.DB, maxWait time.Duration, maxRecs int, m *metrics, now func() time.Time,
	onFail func(error, map[*device]bool), onOK func()) *writer {
	return &writer{db: db, in: make(chan *record, 4*maxRecs), maxWait: maxWait, maxRecs: maxRecs, m: m, now: now,
		onFail: onFail, onOK: onOK}
}

// submit queues a record; it blocks when the queue is full (back-pressure on
// the device's stream) and fails once the writer is closing.
func (w *writer) submit(ctx context.Context, r *record) error {
	w.mu.Lock()
	closed := w.closed
	w.mu.Unlock()
	if closed {
		return errWriterClosed
	}
	select {
	case w.in <- r:
		w.m.writerQueue.Inc()
		return nil
	case <-ctx.Done():
		return context.Cause(ctx)
	}
}

// sync queues r (which may be empty) and waits until it is durable.
func (w *writer) sync(ctx context.Context, r *record) error {
	if r == nil {
		r = &record{}
	}
	r.done = make(chan error, 1)
	if err := w.submit(ctx, r); err != nil {
		return err
	}
	select {
	case err := <-r.done:
		return err
	case <-ctx.Done():
		return context.Cause(ctx)
	}
}

// close stops accepting records; run drains what is queued and returns.
func (w *writer) close() {
	w.mu.Lock()
	defer w.mu.Unlock()
	if !w.closed {
		w.closed = true
		close(w.in)
	}
}

// pending is the batch run is assembling: the records in it and their
// store form. Owned by run.
type pending struct {
	b       store.Batch
	recs    []*record
	curIdx  map[*device]int  // index of a device's cursor in b.Cursors
	devSeen map[*device]bool // scratch: devices with data in a failed batch
}

// Commit pacing. Under constant load the writer would otherwise commit back
// to back: a batch starts with the record that waited during the previous
// commit, so the number of commits per second is set by how fast a commit
// finishes. Much of a commit's cost does not depend on its size (it
// rewrites the cursor and ledger pages of every device that sent, which at a
// few hundred devices per batch is nearly all of them, and syncs the file),
// so the store's CPU grew with whatever CPU was spare (store
// BenchmarkIngestBatch: CPU per message against batch size;
// BenchmarkWriterPacing here: paced against unpaced). The writer therefore
// starts a commit no sooner than paceFactor times the previous commit's
// duration after that one started: it is busy committing at most
// 1/paceFactor of the time. Pacing never spaces commits more than maxPace
// apart (a commit that itself takes maxPace or longer is followed at once,
// as before: the writer never idles while it is the bottleneck), so a
// message waits at most about maxPace plus a commit more than without it.
// When commits are quick (little load, a fast disk) BatchDelay governs and
// nothing changes.
//
// maxPace is small on purpose: bigger batches cost the ack tail. A commit
// acknowledges its whole batch at once, so every stream in it wakes its
// sender together, and (likely; not measured apart) the writer then waits
// for a core behind them; at
// 5,000 devices on a shared machine a 100 ms bound left the gateway in
// commits of 150 ms and more that it did not leave (p99 of seconds; the
// code before pacing got there too, under more load), and a 50 ms batch
// delay had given a p99 of 991 ms on a quiet one. Pace harder only after
// acknowledgements stop coming in such bursts.
const (
	paceFactor = 4
	maxPace    = 30 * time.Millisecond
)

// paceInterval is the least time between the start of a commit that took d
// and the start of the next.
func paceInterval(d time.Duration) time.Duration {
	return min(paceFactor*d, max(d, maxPace))
}

// run commits batches until the input is closed and drained: it takes the
// first waiting record, then more until maxRecs, or until maxWait after the
// first and the pacing interval since the previous commit started have both
// passed, and
// commits them in one transaction.
func (w *writer) run() {
	bt := &pending{curIdx: map[*device]int{}, devSeen: map[*device]bool{}}
	timer := time.NewTimer(time.Hour)
	timer.Stop()
	var nextAt time.Time // earliest start of the next commit (pacing)
	for {
		r, ok := <-w.in
		if !ok {
			w.takeCarry(bt)
			w.commit(bt)
			return
		}
		w.m.writerQueue.Dec()
		w.takeCarry(bt)
		w.add(bt, r)
		timer.Reset(max(w.maxWait, time.Until(nextAt)))
	collect:
		for len(bt.recs) < w.maxRecs {
			select {
			case r, ok := <-w.in:
				if !ok {
					break collect
				}
				w.m.writerQueue.Dec()
				w.add(bt, r)
			case <-timer.C:
				break collect
			}
		}
		timer.Stop()
		start := time.Now()
		w.commit(bt)
		end := time.Now()
		if !w.unpaced {
			nextAt = start.Add(paceInterval(end.Sub(start)))
		}
		if w.paced != nil {
			w.paced(start, end)
		}
	}
}

// add puts r into the batch.
func (w *writer) add(bt *pending, r *record) {
	b := &bt.b
	bt.recs = append(bt.recs, r)
	if r.seq > 0 && r.dev != nil && r.epoch != r.dev.epoch.Load() {
		// Accepted before a batch with this device's data failed:
		// everything of the device after the failed range waits for
		// the device to resend from its durable point (internal/store/doc.go
		// states the rule and why it holds). The data goes; what is
		// not data (alarm episodes and state) is still written.
		w.m.discarded.Inc()
		r.seq, r.stream, r.chunk, r.points, r.raw = 0, nil, nil, nil, nil
	}
	if r.desc != nil {
		b.Devices = append(b.Devices, r.desc)
	}
	if r.dev != nil && r.seq > 0 {
		if i, ok := bt.curIdx[r.dev]; ok {
			b.Cursors[i] = r.cursor
		} else {
			bt.curIdx[r.dev] = len(b.Cursors)
			b.Cursors = append(b.Cursors, r.cursor)
		}
	}
	if r.chunk != nil {
		b.Chunks = append(b.Chunks, *r.chunk)
	}
	b.Points = append(b.Points, r.points...)
	if r.raw != nil {
		b.Raw = append(b.Raw, *r.raw)
	}
	if r.session != nil {
		b.Sessions = append(b.Sessions, *r.session)
	}
	b.Episodes = append(b.Episodes, r.episodes...)
	if r.alarm != nil && r.dev != nil {
		if b.AlarmStates == nil {
			b.AlarmStates = map[string][]byte{}
		}
		b.AlarmStates[r.dev.id] = r.alarm
	}
	b.Audit = append(b.Audit, r.audit...)
}

// takeCarry puts what failed batches carried over into the batch.
func (w *writer) takeCarry(bt *pending) {
	for _, r := range w.carry {
		w.add(bt, r)
	}
	clear(w.carry)
	w.carry = w.carry[:0]
}

// commit writes the batch in one transaction, then acknowledges its data
// records (or, when it failed, carries its other parts over and reports
// the devices with data in it), and empties it.
func (w *writer) commit(bt *pending) {
	if len(bt.recs) == 0 {
		return
	}
	start := w.now()
	err := w.db.Write(&bt.b)
	end := w.now()
	w.m.commitSeconds.Observe(end.Sub(start).Seconds())
	w.m.batchRecords.Observe(float64(len(bt.recs)))
	if err != nil {
		w.m.storeErrors.Inc()
		clear(bt.devSeen)
		for _, r := range bt.recs {
			if r.seq > 0 && r.dev != nil {
				bt.devSeen[r.dev] = true
			}
			if c := r.control(); c != nil && len(w.carry) < maxCarry {
				w.carry = append(w.carry, c)
			} else if c != nil {
				w.m.carryDropped.Inc()
			}
		}
		// Before any later record is added: from here on, records of
		// these devices accepted before now are not data any more.
		w.onFail(err, bt.devSeen)
	} else {
		w.onOK()
	}
	clear(bt.devSeen)
	for _, r := range bt.recs {
		if err == nil && r.seq > 0 {
			w.m.durableSeconds.Observe(end.Sub(r.received).Seconds())
			if r.dev != nil {
				r.dev.markDurable(r.seq)
			}
			if r.stream != nil {
				r.stream.ackThrough(r.seq)
			}
		}
		if r.done != nil {
			r.done <- err
		}
	}
	clear(bt.recs)
	bt.recs = bt.recs[:0]
	clear(bt.curIdx)
	bt.b.Reset()
}

// control returns a record with r's parts that are not a device's data (nil
// when there are none): what a failed batch carries into the next one.
func (r *record) control() *record {
	if r.desc == nil && r.session == nil && len(r.episodes) == 0 && r.alarm == nil && len(r.audit) == 0 {
		return nil
	}
	return &record{dev: r.dev, desc: r.desc, session: r.session, episodes: r.episodes, alarm: r.alarm, audit: r.audit}
}
