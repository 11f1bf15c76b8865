package main

import (
	"bufio"
	"context"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"syscall"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// benchTuneGrid is the project target's grid: 10 limits x 10 delays = 100
// profiles of one spo2_low condition with escalation.
const benchTuneGrid = `base:
  name: bench
  conditions:
    - {kind: spo2_low, limit: 90, hysteresis: 1, delay: 15s, priority: medium, escalate: {below: 80, priority: high}}
sweep:
  spo2_low.limit: [86, 87, 88, 89, 90, 91, 92, 93, 94, 95]
  spo2_low.delay: [0s, 5s, 10s, 15s, 20s, 30s, 45s, 60s, 90s, 120s]
reference:
  rule: {below: 85, for: 60s}
`

// benchTrend calls fn for 1,000 device-hours of invented 1 Hz trend (100
// devices x 10 h; demo data): devices around 95 % with dips, 1 % missing.
// t is seconds from the start.
func benchTrend(fn func(dev, t int, spo2, pulse, pi, sqi float64)) {
	r := rand.New(rand.NewPCG(1, 20))
	for d := range 100 {
		dip, depth := 0, 0.0
		for t := range 36000 {
			if dip == 0 && r.IntN(900) == 0 {
				dip, depth = 5+r.IntN(180), 3+14*r.Float64()
			}
			v := 95.5 + 0.7*r.NormFloat64()
			if dip > 0 {
				v -= depth
				dip--
			}
			v = math.Round(math.Min(100, v)*10) / 10
			if r.IntN(100) == 0 {
				v = math.NaN()
			}
			fn(d, t, v, float64(60+r.IntN(20)), float64(r.IntN(300))/100, float64(r.IntN(100))/100)
		}
	}
}

// BenchmarkTuneCommand runs the whole `pulsefleet tune` command (read,
// sweep 100 profiles, write the summary, report and profiles) over 1,000
// device-hours, from a trend CSV (--in, 3.6 million rows, written once in
// a temporary directory) and from a store (--data). Target (issue 20):
// at most 1 s each on the project's 2-core machine. MB/s is the CSV's size
// per run (csv only); cpu-s/run is the process's CPU time.
func BenchmarkTuneCommand(b *testing.B) {
	dir := b.TempDir()
	grid := filepath.Join(dir, "grid.yaml")
	if err := os.WriteFile(grid, []byte(benchTuneGrid), 0o644); err != nil {
		b.Fatal(err)
	}
	b.Run("csv", func(b *testing.B) {
		path := filepath.Join(dir, "trend.csv")
		f, err := os.Create(path)
		if err != nil {
			b.Fatal(err)
		}
		w := bufio.NewWriter(f)
		io.WriteString(w, "t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi\n")
		row := make([]byte, 0, 64)
		num := func(v float64) {
			if v == v {
				row = strconv.AppendFloat(row, v, 'g', -1, 64)
			}
		}
		benchTrend(func(dev, t int, spo2, pulse, pi, sqi float64) {
			row = strconv.AppendInt(row[:0], int64(t), 10)
			row = fmt.Appendf(row, ",bench-%03d,", dev)
			num(spo2)
			row = append(row, ',')
			num(pulse)
			row = append(row, ',')
			num(pi)
			row = append(row, ',')
			num(sqi)
			row = append(row, '\n')
			w.Write(row)
		})
		if err := w.Flush(); err != nil {
			b.Fatal(err)
		}
		f.Close()
		st, err := os.Stat(path)
		if err != nil {
			b.Fatal(err)
		}
		b.SetBytes(st.Size())
		benchTuneRun(b, "--in", path, "--out", filepath.Join(dir, "out-csv"))
	})
	b.Run("store", func(b *testing.B) {
		data := filepath.Join(dir, "data")
		db, err := store.Open(data, store.Options{})
		if err != nil {
			b.Fatal(err)
		}
		start := time.Now().Add(-11 * time.Hour).Truncate(time.Second).UnixMilli()
		batch := &store.Batch{}
		flush := func() {
			if err := db.Write(batch); err != nil {
				b.Fatal(err)
			}
			batch = &store.Batch{}
		}
		for d := range 100 {
			batch.Devices = append(batch.Devices, &store.Device{ID: fmt.Sprintf("bench-%03d", d), Mode: "summary"})
		}
		flush()
		benchTrend(func(dev, t int, spo2, pulse, pi, sqi float64) {
			if spo2 != spo2 {
				spo2 = 0
			}
			batch.Points = append(batch.Points, store.Point{Device: fmt.Sprintf("bench-%03d", dev), TimeMS: start + int64(t)*1000,
				SpO2: spo2, Pulse: pulse, PI: pi, SQI: sqi, Source: 2})
			if len(batch.Points) == 36000 {
				flush()
			}
		})
		flush()
		if err := db.Close(); err != nil {
			b.Fatal(err)
		}
		benchTuneRun(b, "--data", data, "--out", filepath.Join(dir, "out-store"))
	})
}

func benchTuneRun(b *testing.B, args ...string) {
	grid := filepath.Join(filepath.Dir(args[1]), "grid.yaml") // beside the trend file or data directory
	cpu0 := cpuTime()
	for b.Loop() {
		var out, errb countWriter
		if code := run(context.Background(), append([]string{"tune", "--grid", grid}, args...), stdio{in: nil, out: &out, err: &errb}); code != 0 {
			b.Fatalf("tune exited %d", code)
		}
	}
	b.ReportMetric(b.Elapsed().Seconds()/float64(b.N), "s/run")
	b.ReportMetric((cpuTime()-cpu0).Seconds()/float64(b.N), "cpu-s/run")
}

// cpuTime is the process's user + system CPU time so far.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

type countWriter struct{ n int }

func (w *countWriter) Write(p []byte) (int, error) { w.n += len(p); return len(p), nil }
