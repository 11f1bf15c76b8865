package tune

import (
	"errors"
	"fmt"
	"math"
	"sort"
	"strings"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Filter selects the trends to sweep. The zero Filter selects everything.
type Filter struct {
	// Devices lists the devices to keep; empty keeps every device. A listed
	// device that has no trend is an error.
	Devices []string
	// From and To bound sample times to [From, To) in seconds on the
	// trend's clock (Unix seconds in a store); each applies only when its
	// Has flag is set.
	From, To       float64
	HasFrom, HasTo bool
}

func (f Filter) String() string {
	var parts []string
	if len(f.Devices) > 0 {
		parts = append(parts, "devices "+strings.Join(f.Devices, ","))
	}
	if f.HasFrom {
		parts = append(parts, fmt.Sprintf("from %g s", f.From))
	}
	if f.HasTo {
		parts = append(parts, fmt.Sprintf("to %g s", f.To))
	}
	return strings.Join(parts, ", ")
}

func (f Filter) check() error {
	if f.HasFrom && f.HasTo && !(f.To > f.From) {
		return fmt.Errorf("filter: to %g, want after from %g", f.To, f.From)
	}
	return nil
}

// FilterTrends applies f to trends (samples are sliced, not copied). Trends
// left without samples are dropped.
func FilterTrends(trends []alarms.Trend, f Filter) ([]alarms.Trend, error) {
	if err := f.check(); err != nil {
		return nil, err
	}
	keep := map[string]bool{}
	for _, d := range f.Devices {
		keep[d] = false
	}
	var out []alarms.Trend
	for _, tr := range trends {
		if len(f.Devices) > 0 {
			if _, ok := keep[tr.Device]; !ok {
				continue
			}
			keep[tr.Device] = true
		}
		s := tr.Samples
		if f.HasFrom {
			s = s[sort.Search(len(s), func(i int) bool { return s[i].T >= f.From }):]
		}
		if f.HasTo {
			s = s[:sort.Search(len(s), func(i int) bool { return s[i].T >= f.To })]
		}
		if len(s) > 0 {
			out = append(out, alarms.Trend{Device: tr.Device, Samples: s})
		}
	}
	for _, d := range f.Devices {
		if !keep[d] {
			return nil, fmt.Errorf("filter: device %q has no trend in the input", d)
		}
	}
	return out, nil
}

// LoadStore reads trend history from the store in dir, read-only, applying
// f. Times become Unix seconds. A store held by a running gateway gives an
// error that says so (wrapping store.ErrLocked).
func LoadStore(dir string, f Filter) ([]alarms.Trend, error) {
	if err := f.check(); err != nil {
		return nil, err
	}
	db, err := openStore(dir)
	if err != nil {
		return nil, err
	}
	defer db.Close()
	devs, err := db.TrendDevices()
	if err != nil {
		return nil, fmt.Errorf("store %s: list devices: %w", dir, err)
	}
	if len(f.Devices) > 0 {
		have := map[string]bool{}
		for _, d := range devs {
			have[d] = true
		}
		for _, d := range f.Devices {
			if !have[d] {
				return nil, fmt.Errorf("filter: device %q has no trend in store %s", d, dir)
			}
		}
		devs = f.Devices
	}
	fromMS, toMS := storeRange(f)
	var out []alarms.Trend
	for _, d := range devs {
		tr := alarms.Trend{Device: d}
		err := db.Trend(d, fromMS, toMS, func(p store.Point) bool {
			tr.Samples = append(tr.Samples, alarms.Sample{T: float64(p.TimeMS) / 1000,
				SpO2: p.SpO2, Pulse: p.Pulse, PI: p.PI, SQI: p.SQI})
			return true
		})
		if err != nil {
			return nil, fmt.Errorf("store %s: trend of %s: %w", dir, d, err)
		}
		if len(tr.Samples) > 0 {
			out = append(out, tr)
		}
	}
	return out, nil
}

// openStore opens the store in dir read-only; a store held by a running
// gateway gives an error that says so (wrapping store.ErrLocked).
func openStore(dir string) (*store.DB, error) {
	db, err := store.Open(dir, store.Options{ReadOnly: true})
	if err != nil {
		if errors.Is(err, store.ErrLocked) {
			return nil, fmt.Errorf("open store %s: %w: tune reads history read-only; stop the gateway or copy %s elsewhere and tune the copy",
				dir, err, store.FileName)
		}
		return nil, fmt.Errorf("open store %s: %w", dir, err)
	}
	return db, nil
}

// storeRange is f's time range in Unix ms for store queries. Unbounded:
// from the Unix epoch (store keys are unsigned) to far beyond any device
// clock (2^53 ms, whose day number fits the store's).
func storeRange(f Filter) (fromMS, toMS int64) {
	fromMS, toMS = 0, int64(1)<<53
	if f.HasFrom {
		fromMS = max(0, int64(math.Ceil(f.From*1000)))
	}
	if f.HasTo {
		toMS = min(toMS, int64(math.Ceil(f.To*1000)))
	}
	return fromMS, toMS
}
