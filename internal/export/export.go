package export

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"

	"github.com/pulsefleet/pulsefleet/internal/participants"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Source is what Run reads; *store.DB satisfies it.
type Source interface {
	Devices() ([]store.Device, error)
	TrendDevices() ([]string, error)
	Trend(device string, fromMS, toMS int64, fn func(store.Point) bool) error
}

var _ Source = (*store.DB)(nil)

// Writer receives an export: Begin once with the exported devices (in export
// order), then their points (per device, oldest first), then Close, which
// completes the document (it does not close the underlying io.Writer).
type Writer interface {
	Begin(devices []store.Device) error
	Point(p *store.Point) error
	Close() error
}

// ParticipantWriter is a Writer that also names the participant of the
// points that follow (Run calls Participant before the first point and
// whenever it changes; "" = no participant enrolled at that time).
type ParticipantWriter interface {
	Participant(pid string) error
}

// Options selects what Run exports.
type Options struct {
	// Enrolments say whose each point is: a point of device D at time t is
	// the participant's whose enrolment on D contains t ("" when none).
	Enrolments []participants.Interval
	// Participant, when set, exports only that participant's history,
	// stitched from Enrolments (one stretch per enrolment, in start order);
	// Devices must then be empty.
	Participant string
	// Devices to export, in this order; empty means every device with trend
	// points, ordered by id. A listed device unknown to the store is an error.
	Devices []string
	// FromMS and ToMS bound the points' time (Unix ms, device clock):
	// FromMS <= t < ToMS. FromMS 0 (or negative) means from the start; ToMS 0
	// means no end.
	FromMS, ToMS int64
	// Progress, when set, is called every ProgressEvery points, at the start
	// of each device and once at the end (Done set).
	Progress func(Progress)
	// ProgressEvery is the number of points between Progress calls; 0 means 100,000.
	ProgressEvery int64
}

// Progress reports how far Run has come.
type Progress struct {
	Device      string // device being exported
	DeviceIndex int    // 1-based
	DeviceCount int
	Points      int64 // points written so far, all devices
	Done        bool
}

// Stats is what Run exported.
type Stats struct {
	Devices int   // devices in the export
	Points  int64 // trend points written
}

// Run exports the selected trend points of src into w and closes w. It stops
// early with ctx's error when ctx is cancelled.
func Run(ctx context.Context, src Source, w Writer, opt Options) (Stats, error) {
	var st Stats
	from, to := max(opt.FromMS, 0), opt.ToMS
	if to == 0 {
		to = math.MaxInt64
	}
	if to <= from {
		return st, fmt.Errorf("export: time range [%d, %d) ms is empty: --to must be after --from", opt.FromMS, opt.ToMS)
	}
	every := opt.ProgressEvery
	if every <= 0 {
		every = 100_000
	}
	segs, devs, err := plan(src, opt, from, to)
	if err != nil {
		return st, err
	}
	st.Devices = len(devs)
	if err := w.Begin(devs); err != nil {
		return st, fmt.Errorf("export: %w", err)
	}
	report := func(p Progress) {
		if opt.Progress != nil {
			opt.Progress(p)
		}
	}
	var cur store.Point
	pw, _ := w.(ParticipantWriter)
	named, said := "", false
	for i, sg := range segs {
		if err := ctx.Err(); err != nil {
			return st, fmt.Errorf("export: %w", err)
		}
		pr := Progress{Device: sg.Device, DeviceIndex: i + 1, DeviceCount: len(segs), Points: st.Points}
		report(pr)
		hold := newHolder(opt.Enrolments, sg.Device)
		var werr error
		err := src.Trend(sg.Device, sg.FromMS, sg.ToMS, func(p store.Point) bool {
			if pid := hold.at(p.TimeMS); pw != nil && (pid != named || !said) {
				if werr = pw.Participant(pid); werr != nil {
					return false
				}
				named, said = pid, true
			}
			cur = p // one heap copy for the whole export, not one per point
			if werr = w.Point(&cur); werr != nil {
				return false
			}
			st.Points++
			if st.Points%every == 0 {
				if werr = ctx.Err(); werr != nil {
					return false
				}
				pr.Points = st.Points
				report(pr)
			}
			return true
		})
		if werr != nil {
			return st, fmt.Errorf("export: device %q: %w", sg.Device, werr)
		}
		if err != nil {
			return st, fmt.Errorf("export: %w", err)
		}
	}
	if err := w.Close(); err != nil {
		return st, fmt.Errorf("export: %w", err)
	}
	report(Progress{DeviceIndex: len(segs), DeviceCount: len(segs), Points: st.Points, Done: true})
	return st, nil
}

// plan returns the stretches to export, in order, and the device records of
// the export: one stretch per device over [from, to), or with
// opt.Participant one per enrolment of that participant.
func plan(src Source, opt Options, from, to int64) ([]participants.Segment, []store.Device, error) {
	if opt.Participant == "" {
		devs, err := selectDevices(src, opt.Devices)
		segs := make([]participants.Segment, len(devs))
		for i, d := range devs {
			segs[i] = participants.Segment{Device: d.ID, FromMS: from, ToMS: to}
		}
		return segs, devs, err
	}
	if len(opt.Devices) > 0 {
		return nil, nil, fmt.Errorf("export: --participant and --device: give one of them (a participant's devices come from the enrolments)")
	}
	segs := participants.Stitch(opt.Enrolments, opt.Participant, from, to)
	if len(segs) == 0 {
		return nil, nil, fmt.Errorf("export: participant %s has no enrolment in the range", opt.Participant)
	}
	var ids []string
	for _, sg := range segs {
		if !slices.Contains(ids, sg.Device) {
			ids = append(ids, sg.Device)
		}
	}
	recs, err := src.Devices()
	if err != nil {
		return nil, nil, fmt.Errorf("export: %w", err)
	}
	devs := make([]store.Device, 0, len(ids))
	for _, id := range ids {
		d := store.Device{ID: id}
		for _, r := range recs {
			if r.ID == id {
				d = r
			}
		}
		devs = append(devs, d)
	}
	return segs, devs, nil
}

// holder finds the participant of one device's points, which come in time
// order: it walks the device's enrolments along.
type holder struct {
	ivs []participants.Interval // the device's, by start
}

func newHolder(all []participants.Interval, device string) *holder {
	h := &holder{}
	for _, iv := range all {
		if iv.Device == device {
			h.ivs = append(h.ivs, iv)
		}
	}
	slices.SortFunc(h.ivs, func(a, b participants.Interval) int { return cmpInt(a.FromMS, b.FromMS) })
	return h
}

func cmpInt(a, b int64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}

// at returns the participant holding the device at t ("" when none). Times
// only increase between calls, so passed enrolments are dropped.
func (h *holder) at(t int64) string {
	for len(h.ivs) > 0 && h.ivs[0].End() <= t {
		h.ivs = h.ivs[1:]
	}
	if len(h.ivs) > 0 && h.ivs[0].Contains(t) {
		return h.ivs[0].Participant
	}
	return ""
}

// selectDevices returns the device records to export, in export order. A
// device with trend points but no record gets a record with only its id.
func selectDevices(src Source, want []string) ([]store.Device, error) {
	recs, err := src.Devices()
	if err != nil {
		return nil, fmt.Errorf("export: %w", err)
	}
	withTrend, err := src.TrendDevices()
	if err != nil {
		return nil, fmt.Errorf("export: trend devices: %w", err)
	}
	byID := make(map[string]store.Device, len(recs))
	for _, d := range recs {
		byID[d.ID] = d
	}
	ids := want
	if len(ids) == 0 {
		ids = slices.Clone(withTrend)
		slices.Sort(ids)
	}
	out := make([]store.Device, 0, len(ids))
	seen := map[string]bool{}
	for _, id := range ids {
		if seen[id] {
			continue
		}
		seen[id] = true
		d, ok := byID[id]
		if !ok {
			if !slices.Contains(withTrend, id) {
				return nil, fmt.Errorf("export: device %q is not in the store (%s)", id, known(recs))
			}
			d = store.Device{ID: id}
		}
		out = append(out, d)
	}
	return out, nil
}

func known(recs []store.Device) string {
	if len(recs) == 0 {
		return "the store has no devices"
	}
	names := make([]string, 0, min(len(recs), 10))
	for i, d := range recs {
		if i == 10 {
			names = append(names, fmt.Sprintf("and %d more", len(recs)-10))
			break
		}
		names = append(names, fmt.Sprintf("%q", d.ID))
	}
	return "known: " + strings.Join(names, ", ")
}

// errClosed is returned by a Writer used after Close.
var errClosed = errors.New("writer already closed")
