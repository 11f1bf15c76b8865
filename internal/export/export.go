package export

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"

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

// Options selects what Run exports.
type Options struct {
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
	devs, err := selectDevices(src, opt.Devices)
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
	for i, d := range devs {
		if err := ctx.Err(); err != nil {
			return st, fmt.Errorf("export: %w", err)
		}
		pr := Progress{Device: d.ID, DeviceIndex: i + 1, DeviceCount: len(devs), Points: st.Points}
		report(pr)
		var werr error
		err := src.Trend(d.ID, from, to, func(p store.Point) bool {
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
			return st, fmt.Errorf("export: device %q: %w", d.ID, werr)
		}
		if err != nil {
			return st, fmt.Errorf("export: %w", err)
		}
	}
	if err := w.Close(); err != nil {
		return st, fmt.Errorf("export: %w", err)
	}
	report(Progress{DeviceIndex: len(devs), DeviceCount: len(devs), Points: st.Points, Done: true})
	return st, nil
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
