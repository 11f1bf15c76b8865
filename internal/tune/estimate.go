package tune

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"sync/atomic"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Estimated is trend history re-estimated from raw captures, once per
// averaging time.
type Estimated struct {
	// AveragingS is the averaging times, s, in the order asked.
	AveragingS []float64
	// Trends is [averaging][device]: every set holds the devices used, in
	// the same order, with the same sample times (one per estimated second).
	Trends [][]alarms.Trend
	// Calibrations is each used device's calibration as recorded and
	// applied ("empirical", "beer-lambert@660/940nm", "name@vN").
	Calibrations map[string]string
	// Skipped lists the store's devices that have no raw captures in the
	// time range (summary-mode devices, or raw capture was off); they are
	// left out of the sweep.
	Skipped []string
	// Chunks and SamplePairs count the raw captures read (each once);
	// Restarts the estimator (re)starts per averaging time (a rate change,
	// a clock jump over 1 s, a skipped sequence number), summed over devices.
	Chunks, SamplePairs, Restarts int
}

// EstimateOptions set how EstimateStore works.
type EstimateOptions struct {
	// Workers is the number of goroutines (devices estimated at once);
	// zero means runtime.GOMAXPROCS(0).
	Workers int
	// Progress, when non-nil, is called with devices done and the total, a
	// few times a second and once at the end; never concurrently.
	Progress func(done, total int)
}

// EstimateStore re-runs the estimator over the raw captures kept in the
// store in dir (opened read-only), for each of averagingS (s), applying f,
// the way the gateway estimated them live (estimator.Timeline: the
// device's ADC bits and recorded calibration; a restart on a rate change, a
// device-time jump over 1 s or a skipped sequence number; each point at the
// end of its second on the device clock). Points are kept in time order,
// one per second as the store would hold them (a later point of the same
// second replaces an earlier one). Unlike the gateway it cannot restart at
// a reconnect whose clock and sequence continue (package doc).
//
// Devices without raw captures in range are skipped (Estimated.Skipped),
// unless f names them, which is an error; so is a store with no raw
// captures at all, or a device whose recorded calibration cannot be
// resolved. The estimator warms up from the first capture in range, so the
// first few seconds after f.From carry no values.
func EstimateStore(ctx context.Context, dir string, f Filter, averagingS []float64, opt EstimateOptions) (*Estimated, error) {
	if err := f.check(); err != nil {
		return nil, err
	}
	if len(averagingS) == 0 {
		return nil, errors.New("tune: estimate: no averaging times")
	}
	db, err := openStore(dir)
	if err != nil {
		return nil, err
	}
	defer db.Close()
	fromMS, toMS := storeRange(f)
	est := &Estimated{AveragingS: slices.Clone(averagingS), Calibrations: map[string]string{}}
	jobs, err := estimateJobs(db, dir, f, est)
	if err != nil {
		return nil, err
	}

	sets := make([][]alarms.Trend, len(averagingS))
	for a := range sets {
		sets[a] = make([]alarms.Trend, len(jobs))
	}
	var chunks, pairs, restarts, done atomic.Int64
	stop := startProgress(opt.Progress, &done, len(jobs))
	defer stop()
	err = parallel(ctx, workerCount(opt.Workers), len(jobs), func(_, j int) error {
		n, np, err := reestimate(ctx, db, dir, jobs[j], averagingS, fromMS, toMS, sets, j)
		if err != nil {
			return err
		}
		for a := range sets {
			sets[a][j].Samples = timeOrder(sets[a][j].Samples, f)
		}
		restarts.Add(np.restarts)
		chunks.Add(n)
		pairs.Add(np.pairs)
		done.Add(1)
		return nil
	})
	if err != nil {
		return nil, err
	}
	est.Trends = sets
	est.Chunks, est.SamplePairs = int(chunks.Load()), int(pairs.Load())
	est.Restarts = int(restarts.Load()) / len(averagingS)
	return est, nil
}

// estimateJob is one device to re-estimate, with its calibration.
type estimateJob struct {
	dev store.Device
	cal estimator.Calibration
}

// estimateJobs picks the filter's devices (all when it names none) that
// have raw captures in its range, with their calibrations; it lists the
// others in est.Skipped and records the calibrations in est.
func estimateJobs(db *store.DB, dir string, f Filter, est *Estimated) ([]estimateJob, error) {
	all, err := db.Devices()
	if err != nil {
		return nil, fmt.Errorf("store %s: list devices: %w", dir, err)
	}
	byID := map[string]store.Device{}
	for _, d := range all {
		byID[d.ID] = d
	}
	ids := f.Devices
	for _, id := range ids {
		if _, ok := byID[id]; !ok {
			return nil, fmt.Errorf("filter: device %q is not in store %s", id, dir)
		}
	}
	if len(ids) == 0 {
		for _, d := range all {
			ids = append(ids, d.ID)
		}
	}
	fromMS, toMS := storeRange(f)
	var jobs []estimateJob
	for _, id := range ids {
		has := false
		if err := db.RawCaptures(id, fromMS, toMS, func(store.RawCapture) bool { has = true; return false }); err != nil {
			return nil, fmt.Errorf("store %s: raw captures of %s: %w", dir, id, err)
		}
		if !has {
			if len(f.Devices) > 0 {
				return nil, fmt.Errorf("filter: device %q has no raw captures in store %s%s", id, dir, rangeNote(f))
			}
			est.Skipped = append(est.Skipped, id)
			continue
		}
		d := byID[id]
		cal, applied, err := deviceCalibration(db, d)
		if err != nil {
			return nil, fmt.Errorf("device %s: calibration %q: %w", id, d.Calibration, err)
		}
		est.Calibrations[id] = applied
		jobs = append(jobs, estimateJob{dev: d, cal: cal})
	}
	if len(jobs) == 0 {
		return nil, fmt.Errorf("store %s has no raw captures%s (of %d devices); raw capture is on with `pulsefleet serve --capture-raw`",
			dir, rangeNote(f), len(all))
	}
	return jobs, nil
}

// reestimateCounts is what re-estimating one device went through.
type reestimateCounts struct {
	pairs    int64 // sample pairs
	restarts int64 // estimator restarts, over all averaging times
}

// reestimate runs one device's raw captures in [fromMS, toMS) through an
// estimator per averaging time into sets[a][j] (device time order, as
// stored), not bridging missing chunks; dir names the store in errors. It
// returns the chunks read.
func reestimate(ctx context.Context, db *store.DB, dir string, dj estimateJob, averagingS []float64, fromMS, toMS int64, sets [][]alarms.Trend, j int) (int64, reestimateCounts, error) {
	var cnt reestimateCounts
	tls := make([]*estimator.Timeline, len(averagingS))
	for a, avg := range averagingS {
		tl, err := estimator.NewTimeline(estimator.Config{ADCBits: int(dj.dev.ADCBits), Calibration: dj.cal, AveragingS: avg})
		if err != nil {
			return 0, cnt, fmt.Errorf("device %s: %w", dj.dev.ID, err)
		}
		tls[a] = tl
	}
	var out []estimator.TimedEstimate
	var lastSeq uint64
	var n int64
	var perr error
	err := db.RawCaptures(dj.dev.ID, fromMS, toMS, func(c store.RawCapture) bool {
		if ctx.Err() != nil {
			perr = context.Cause(ctx)
			return false
		}
		gap := n > 0 && c.Seq != lastSeq+1
		lastSeq = c.Seq
		n++
		cnt.pairs += int64(min(len(c.Red), len(c.IR)))
		for a, tl := range tls {
			if gap {
				tl.Gap() // chunks are missing: do not bridge them
			}
			out, perr = tl.PushCodes(c.DeviceTimeMS, c.RateHz, c.Red, c.IR, c.Ambient, out[:0])
			if perr != nil {
				perr = fmt.Errorf("device %s: raw capture %d: %w", dj.dev.ID, c.Seq, perr)
				return false
			}
			tr := &sets[a][j].Samples
			for _, e := range out {
				*tr = append(*tr, alarms.Sample{T: float64(e.TimeMS) / 1000, SpO2: e.SpO2Pct, Pulse: e.PulseBPM, PI: e.PIPct, SQI: e.SQI})
			}
		}
		return true
	})
	if err == nil {
		err = perr
	}
	if err != nil {
		return 0, cnt, fmt.Errorf("store %s: %w", dir, err)
	}
	for a, tl := range tls {
		sets[a][j].Device = dj.dev.ID
		cnt.restarts += int64(tl.Restarts())
	}
	return n, cnt, nil
}

// timeOrder sorts samples by time (stable), keeps the last of equal times
// (the store keys points by time, so a later write of a second replaces the
// earlier) and keeps [f.From, f.To).
func timeOrder(s []alarms.Sample, f Filter) []alarms.Sample {
	slices.SortStableFunc(s, func(a, b alarms.Sample) int { return cmpF(a.T, b.T) })
	out := s[:0]
	for i := range s {
		if (f.HasFrom && s[i].T < f.From) || (f.HasTo && s[i].T >= f.To) {
			continue
		}
		if n := len(out); n > 0 && out[n-1].T == s[i].T {
			out[n-1] = s[i]
			continue
		}
		out = append(out, s[i])
	}
	return out
}

// deviceCalibration resolves the calibration a device's raw stream was
// estimated with, exactly as the gateway does (calibration.Resolve over the
// store's curves), and returns the reference as applied.
func deviceCalibration(db *store.DB, d store.Device) (estimator.Calibration, string, error) {
	c, applied, err := calibration.Resolve(d.Calibration, d.RedNM, d.IRNM, db.CalibrationCurve)
	if errors.Is(err, store.ErrNotFound) {
		return nil, "", fmt.Errorf("not a curve kept in this store (want empirical, beer-lambert or a stored name@vN): %w", err)
	}
	return c, applied, err
}

func rangeNote(f Filter) string {
	if !f.HasFrom && !f.HasTo {
		return ""
	}
	g := f
	g.Devices = nil
	return " (" + g.String() + ")"
}
