package store

import (
	"errors"
	"fmt"
	"sort"
	"strings"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/pulsefleet/pulsefleet/internal/ids"
	"github.com/pulsefleet/pulsefleet/internal/participants"
)

// Enrolment errors, for callers that map them to API codes.
var (
	// ErrConflict: the enrolment would give a device to two participants at once.
	ErrConflict = errors.New("enrolment conflict")
	// ErrInvalid: a field is out of its bounds (the message names it).
	ErrInvalid = errors.New("invalid")
	// ErrStillOpen: the participant has an open enrolment (end it first).
	ErrStillOpen = errors.New("enrolment still open")
)

// MaxNoteLen bounds an enrolment note.
const MaxNoteLen = 200

// Enrolment is one stored enrolment: Device's data from FromMS to ToMS
// (exclusive; 0 = open-ended) belong to Participant. Times are device-clock
// Unix milliseconds, like trend points.
type Enrolment struct {
	ID          uint64 `json:"id"` // assigned by the store
	Participant string `json:"participant"`
	Device      string `json:"device"`
	FromMS      int64  `json:"from_ms"`
	ToMS        int64  `json:"to_ms,omitempty"`
	Note        string `json:"note,omitempty"`
	CreatedMS   int64  `json:"created_ms"`
	CreatedBy   string `json:"created_by,omitempty"`
}

// Interval is the enrolment as the pure rules see it.
func (e Enrolment) Interval() participants.Interval {
	return participants.Interval{Participant: e.Participant, Device: e.Device, FromMS: e.FromMS, ToMS: e.ToMS}
}

// checkEnrolment validates one enrolment on its own.
func checkEnrolment(e *Enrolment) error {
	if err := e.Interval().Check(); err != nil {
		return err
	}
	if err := ids.Check("device", e.Device); err != nil {
		return err
	}
	if len(e.Note) > MaxNoteLen {
		return fmt.Errorf("note: %d bytes, want at most %d", len(e.Note), MaxNoteLen)
	}
	if strings.ContainsFunc(e.Note, func(r rune) bool { return r < 0x20 || r == 0x7f }) {
		return fmt.Errorf("note: control characters are not allowed")
	}
	return nil
}

func readEnrolments(tx *bolt.Tx) ([]Enrolment, error) {
	var out []Enrolment
	err := tx.Bucket(bEnrolments).ForEach(func(k, v []byte) error {
		var e Enrolment
		if err := decJSON(v, &e); err != nil {
			return fmt.Errorf("enrolment %x: %w", k, err)
		}
		out = append(out, e)
		return nil
	})
	return out, err
}

func intervals(es []Enrolment) []participants.Interval {
	out := make([]participants.Interval, len(es))
	for i, e := range es {
		out[i] = e.Interval()
	}
	return out
}

func putEnrolment(tx *bolt.Tx, e *Enrolment) error {
	v, err := encJSON(e)
	if err != nil {
		return err
	}
	return tx.Bucket(bEnrolments).Put(u64(e.ID), v)
}

// Enrol stores a new enrolment (its ID assigned here) with an audit entry in
// the same transaction. It refuses, wrapping ErrInvalid, a bad field, and,
// wrapping ErrConflict with both intervals named, an interval during which
// the device already belongs to someone. Intervals in the past are allowed:
// data already stored are then read as the participant's.
func (db *DB) Enrol(e Enrolment, audit *AuditEntry) (Enrolment, error) {
	if err := checkEnrolment(&e); err != nil {
		return Enrolment{}, fmt.Errorf("store: enrol: %w: %w", ErrInvalid, err)
	}
	err := db.update(func(tx *bolt.Tx) error {
		all, err := readEnrolments(tx)
		if err != nil {
			return err
		}
		if err := participants.Conflict(intervals(all), e.Interval()); err != nil {
			return fmt.Errorf("%w: %w", ErrConflict, err)
		}
		if e.ID, err = tx.Bucket(bEnrolments).NextSequence(); err != nil {
			return err
		}
		if err := putEnrolment(tx, &e); err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
	if err != nil {
		return Enrolment{}, fmt.Errorf("store: enrol %s on %s: %w", e.Participant, e.Device, err)
	}
	return e, nil
}

// EndEnrolment ends pid's open enrolment (on device, or the only open one
// when device is "") at atMS, with an audit entry, and returns it. It wraps
// ErrNotFound when there is none, and ErrInvalid when atMS is not after the
// start or when device is "" and several are open.
func (db *DB) EndEnrolment(pid, device string, atMS int64, audit *AuditEntry) (Enrolment, error) {
	var out Enrolment
	err := db.update(func(tx *bolt.Tx) error {
		all, err := readEnrolments(tx)
		if err != nil {
			return err
		}
		var open []Enrolment
		for _, e := range all {
			if e.Participant == pid && e.ToMS == participants.Open && (device == "" || e.Device == device) {
				open = append(open, e)
			}
		}
		switch {
		case len(open) == 0:
			return fmt.Errorf("%w: no open enrolment of %s%s", ErrNotFound, pid, onDevice(device))
		case len(open) > 1:
			devs := make([]string, len(open))
			for i, e := range open {
				devs[i] = e.Device
			}
			return fmt.Errorf("%w: device: %s has %d open enrolments (devices %s); name the device", ErrInvalid, pid, len(open), strings.Join(devs, ", "))
		}
		out = open[0]
		if atMS <= out.FromMS {
			return fmt.Errorf("%w: to: %s is not after the enrolment's start %s", ErrInvalid, fmtMS(atMS), fmtMS(out.FromMS))
		}
		out.ToMS = atMS
		if err := putEnrolment(tx, &out); err != nil {
			return err
		}
		if audit != nil {
			return appendAudit(tx, []*AuditEntry{audit})
		}
		return nil
	})
	if err != nil {
		return Enrolment{}, fmt.Errorf("store: end enrolment: %w", err)
	}
	return out, nil
}

func onDevice(device string) string {
	if device == "" {
		return ""
	}
	return " on device " + device
}

func fmtMS(ms int64) string { return time.UnixMilli(ms).UTC().Format(time.RFC3339) }

// Enrolments returns the enrolments of pid and of device ("" = any), ordered
// by start, then device.
func (db *DB) Enrolments(pid, device string) ([]Enrolment, error) {
	var out []Enrolment
	err := db.view(func(tx *bolt.Tx) error {
		all, err := readEnrolments(tx)
		for _, e := range all {
			if (pid == "" || e.Participant == pid) && (device == "" || e.Device == device) {
				out = append(out, e)
			}
		}
		return err
	})
	if err != nil {
		return nil, fmt.Errorf("store: enrolments: %w", err)
	}
	sort.Slice(out, func(i, j int) bool {
		if out[i].FromMS != out[j].FromMS {
			return out[i].FromMS < out[j].FromMS
		}
		return out[i].Device < out[j].Device
	})
	return out, nil
}

// Stitch returns pid's history in [fromMS, toMS) as segments, one per
// enrolment clipped to the window (participants.Stitch over the stored
// enrolments).
func (db *DB) Stitch(pid string, fromMS, toMS int64) ([]participants.Segment, error) {
	es, err := db.Enrolments(pid, "")
	if err != nil {
		return nil, err
	}
	return participants.Stitch(intervals(es), pid, fromMS, toMS), nil
}

// ParticipantTrend calls fn for each trend point of pid's history in
// [fromMS, toMS): the points of each enrolled device inside its enrolment,
// segment by segment (Stitch's order), until fn returns false. Point.Device
// names the device; the participant is pid for every point.
func (db *DB) ParticipantTrend(pid string, fromMS, toMS int64, fn func(Point) bool) error {
	segs, err := db.Stitch(pid, fromMS, toMS)
	if err != nil {
		return err
	}
	for _, s := range segs {
		stopped := false
		err := db.Trend(s.Device, s.FromMS, s.ToMS, func(p Point) bool {
			if !fn(p) {
				stopped = true
				return false
			}
			return true
		})
		if err != nil || stopped {
			return err
		}
	}
	return nil
}
