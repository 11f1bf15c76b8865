package alarms

import (
	"fmt"
	"io"
	"math"
	"strconv"
	"time"
)

// window keeps the running maximum of (t, SpO2) over the last span seconds.
// It is a queue made of two stacks in one power-of-two ring: the front
// segment [head, head+nf) carries suffix maxima, the back segment
// [head+nf, head+n) a running maximum; when the front runs empty the whole
// queue becomes the front (one pass). Amortised O(1) per sample with few
// unpredictable branches (a monotonic deque mispredicts on noisy SpO2), and
// allocation only when it grows.
type window struct {
	buf         []wentry
	head, n, nf int
	backMax     float64
}

type wentry struct{ t, v, sm float64 }

// tv is one (time, SpO2) point.
type tv struct{ t, v float64 }

func (w *window) reset() { w.head, w.n, w.nf, w.backMax = 0, 0, 0, math.Inf(-1) }

func (w *window) push(t, v, span float64) {
	if w.n == len(w.buf) {
		w.grow()
	}
	mask := len(w.buf) - 1
	w.buf[(w.head+w.n)&mask] = wentry{t: t, v: v}
	w.n++
	if v > w.backMax {
		w.backMax = v
	}
	for w.buf[w.head].t < t-span-eps { // the sample just pushed always stays
		if w.nf == 0 {
			w.rebuild()
		}
		w.head = (w.head + 1) & mask
		w.n--
		w.nf--
	}
}

// rebuild makes the whole queue the front segment.
func (w *window) rebuild() {
	mask := len(w.buf) - 1
	m := math.Inf(-1)
	for k := w.n - 1; k >= 0; k-- {
		e := &w.buf[(w.head+k)&mask]
		if e.v > m {
			m = e.v
		}
		e.sm = m
	}
	w.nf, w.backMax = w.n, math.Inf(-1)
}

func (w *window) grow() {
	size := 2 * len(w.buf)
	if size < 64 {
		size = 64
	}
	nb := make([]wentry, size)
	for i := 0; i < w.n; i++ {
		nb[i] = w.buf[(w.head+i)&(len(w.buf)-1)]
	}
	w.buf, w.head = nb, 0
}

// max is the highest value in the window (-Inf when empty).
func (w *window) max() float64 {
	m := w.backMax
	if w.nf > 0 && w.buf[w.head].sm > m {
		m = w.buf[w.head].sm
	}
	return m
}

// points returns the entries that can still be the maximum (each above
// every later one), oldest first: enough to restore the window exactly.
func (w *window) points() []tv {
	var out []tv
	m := math.Inf(-1)
	for k := w.n - 1; k >= 0; k-- {
		e := w.buf[(w.head+k)&(len(w.buf)-1)]
		if e.v > m {
			m = e.v
			out = append(out, tv{e.t, e.v})
		}
	}
	for i, j := 0, len(out)-1; i < j; i, j = i+1, j-1 {
		out[i], out[j] = out[j], out[i]
	}
	return out
}

// IndexOptions set how DesatIndices scores a recording.
type IndexOptions struct {
	// DropPct is the desaturation depth in SpO2 points below the running
	// baseline (3 or 4 in sleep-medicine scoring); zero means 3.
	DropPct float64
	// Baseline is the running-baseline window (highest valid SpO2 within
	// it); zero means DefaultBaseline (120 s).
	Baseline time.Duration
	// MinDuration is the shortest event counted (the drop must last this
	// long); zero counts every drop.
	MinDuration time.Duration
	// Hysteresis in SpO2 points: an event ends once the drop is below
	// DropPct - Hysteresis; zero ends it as soon as the drop is below DropPct.
	Hysteresis float64
	// MaxGap is the longest interval between consecutive samples counted as
	// recorded time; zero means 5 s. Longer gaps count as not recorded.
	MaxGap time.Duration
	// T90Limit is the SpO2 (%) below which time counts for T90; zero means 90.
	T90Limit float64
}

// Indices summarise the oxygen desaturation of one recording.
//
// Denominator: valid recording time, i.e. the time covered by samples with a
// valid SpO2 (each sample is held until the next one, gaps longer than
// MaxGap excluded). Sleep time is not known to pulsefleet; it would give a
// higher ODI (by about 21 % in Whenn et al., J Clin Sleep Med 2024).
type Indices struct {
	Events     int     // desaturation events counted
	ValidHours float64 // valid recording time, h
	ODIPerHour float64 // Events / ValidHours (NaN when ValidHours is 0)
	T90Pct     float64 // % of valid time with SpO2 < T90Limit (NaN when ValidHours is 0)
}

// DesatIndices scores samples of one recording (time increasing; others are
// skipped). Events are detected by the same engine as the desaturation alarm
// condition, so an event here is an announced desaturation episode with
// delay = MinDuration.
func DesatIndices(samples []Sample, opt IndexOptions) (Indices, error) {
	drop := opt.DropPct
	if drop == 0 {
		drop = 3
	}
	gap := opt.MaxGap.Seconds()
	if gap == 0 {
		gap = 5
	}
	lim := opt.T90Limit
	if lim == 0 {
		lim = 90
	}
	p := &Profile{Name: "desaturation-index", Conditions: []Condition{{
		Kind: Desaturation, Limit: drop, Hysteresis: opt.Hysteresis, Delay: opt.MinDuration,
		Priority: PriorityLow, Baseline: opt.Baseline}}}
	e, err := NewEngine(p, "")
	if err != nil {
		return Indices{}, err
	}
	var ix Indices
	count := func(ev Event) {
		if ev.Type == EventAnnounced {
			ix.Events++
		}
	}
	var valid, below float64
	prevT, prevV := math.Inf(-1), math.NaN()
	for _, s := range samples {
		if !(s.T > prevT) {
			continue
		}
		if dt := s.T - prevT; prevV == prevV && dt <= gap+eps {
			valid += dt
			if prevV < lim {
				below += dt
			}
		}
		prevT, prevV = s.T, math.NaN()
		if s.SpO2 > 0 && s.SpO2 <= 100 {
			prevV = s.SpO2
		}
		e.Eval(s, count)
	}
	ix.ValidHours = valid / 3600
	ix.ODIPerHour, ix.T90Pct = math.NaN(), math.NaN()
	if valid > 0 {
		ix.ODIPerHour = float64(ix.Events) / ix.ValidHours
		ix.T90Pct = 100 * below / valid
	}
	return ix, nil
}

// DeviceIndices is one row of the per-device desaturation summary.
type DeviceIndices struct {
	Device string
	ODI3   Indices // drop >= 3 points
	ODI4   Indices // drop >= 4 points
}

// TrendIndices scores every trend at 3 and 4 points of drop with the other
// options of opt (opt.DropPct is ignored).
func TrendIndices(trends []Trend, opt IndexOptions) ([]DeviceIndices, error) {
	out := make([]DeviceIndices, 0, len(trends))
	for _, tr := range trends {
		d := DeviceIndices{Device: tr.Device}
		var err error
		opt.DropPct = 3
		if d.ODI3, err = DesatIndices(tr.Samples, opt); err != nil {
			return nil, fmt.Errorf("indices for %q: %w", tr.Device, err)
		}
		opt.DropPct = 4
		if d.ODI4, err = DesatIndices(tr.Samples, opt); err != nil {
			return nil, fmt.Errorf("indices for %q: %w", tr.Device, err)
		}
		out = append(out, d)
	}
	return out, nil
}

// IndexColumns is the header of WriteIndicesCSV.
const IndexColumns = "device,valid_hours,events_3pct,odi_3pct_per_h,events_4pct,odi_4pct_per_h,t90_pct"

// WriteIndicesCSV writes the per-device summary: valid hours (3 decimals),
// events and ODI per hour of valid recording time at 3 and 4 points (2
// decimals), and T90 in % of valid time (2 decimals); empty cells when there
// is no valid time.
func WriteIndicesCSV(w io.Writer, rows []DeviceIndices) error {
	f := func(v float64, prec int) string {
		if v != v {
			return ""
		}
		return strconv.FormatFloat(v, 'f', prec, 64)
	}
	return writeCSV(w, "write indices", IndexColumns, len(rows), func(i int) []string {
		r := &rows[i]
		return []string{r.Device, f(r.ODI3.ValidHours, 3), strconv.Itoa(r.ODI3.Events),
			f(r.ODI3.ODIPerHour, 2), strconv.Itoa(r.ODI4.Events), f(r.ODI4.ODIPerHour, 2),
			f(r.ODI3.T90Pct, 2)}
	})
}
