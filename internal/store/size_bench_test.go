package store

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// Storage cost per device-day, measured on a store filled through Write the
// way the gateway's writer fills it: raw devices at 100 Hz sending a
// 25-sample chunk every 250 ms (one ledger record and one cursor each),
// one trend point per device-second, batches of what arrives within 25 ms.
// The raw samples come from the physical PPG model (internal/ppgmodel) at
// 16 bits. Batches hold a second of messages (the gateway's are 10 ms:
// the same records, fewer commits, so a benchmark can fill device-hours).
// Trend and ledger: 50 devices for an hour; raw capture: 10 devices for 10
// minutes. Run with
//
//	go test ./internal/store -run x -bench StorageCost -benchtime 1x
//
// Figures are bytes of pages per device-day (trend, ledger) and per
// device-second (raw), from Stats after the recent log is compacted.
// file_MB/devday is the whole file (free pages included) over the device-
// days held; growth_MB/devday is the file's growth over the second half
// of the fill, the way the issue measured it with du between two minutes.

const (
	sizeRateHz  = 100
	sizeChunk   = 25
	sizeBatchMS = 1000
)

type sizeFill struct {
	seq     []uint64
	raw     bool
	devices int
	seconds int64
	srcs    []*ppgmodel.Source
	rng     *rand.Rand
	red     []float64
	ir      []float64
}

func newSizeFill(raw bool, devices int, seconds int64) *sizeFill {
	f := &sizeFill{raw: raw, devices: devices, seconds: seconds, rng: rand.New(rand.NewPCG(1, 2)), red: make([]float64, sizeChunk), ir: make([]float64, sizeChunk)}
	for i := 0; i < devices; i++ {
		f.srcs = append(f.srcs, ppgmodel.New(ppgmodel.Config{SampleRateHz: sizeRateHz, ADCBits: 16, Seed: uint64(i + 1)}))
	}
	return f
}

// fill writes the seconds [from, to) of every device into db.
func (f *sizeFill) fill(tb testing.TB, db *DB, from, to int64) {
	const t0 = int64(1_780_000_000_000)
	if f.seq == nil {
		f.seq = make([]uint64, f.devices)
	}
	seq := f.seq
	phase := func(d int) int64 { return int64(d*37) % 250 }
	b := &Batch{}
	for i := 0; i < f.devices && from == 0; i++ {
		b.Devices = append(b.Devices, &Device{ID: sizeDev(i), Mode: "raw", ADCBits: 16, BatteryPct: -1})
	}
	vit := ppgmodel.DefaultVitals()
	for ms := from * 1000; ms < to*1000; ms += sizeBatchMS {
		for d := 0; d < f.devices; d++ {
			// A chunk is due every 250 ms from the device's phase.
			for due := ms + (250-mod(ms-phase(d), 250))%250; due < ms+sizeBatchMS; due += 250 {
				f.chunk(b, d, t0+due, &seq[d], vit)
			}
		}
		if b.Len() == 0 {
			continue
		}
		if err := db.Write(b); err != nil {
			tb.Fatal(err)
		}
		b.Reset()
	}
	if err := db.CompactAll(); err != nil {
		tb.Fatal(err)
	}
}

func sizeDev(i int) string { return fmt.Sprintf("ward%d-bed%02d", i/20+1, i%20+1) }

// chunk adds one data message's effects: ledger record, cursor, raw
// capture, and the trend point when it completes a device-second.
func (f *sizeFill) chunk(b *Batch, d int, tms int64, seq *uint64, vit ppgmodel.Vitals) {
	*seq++
	id := sizeDev(d)
	b.Chunks = append(b.Chunks, Chunk{Device: id, Seq: *seq, DeviceTimeMS: tms, ArrivalMS: tms + 35, Samples: sizeChunk})
	b.Cursors = append(b.Cursors, Cursor{Device: id, LastSeq: *seq, Chunks: *seq, Samples: *seq * sizeChunk, LastSeenMS: tms + 35, LastDeviceMS: tms})
	f.srcs[d].Fill(f.red, f.ir, nil, vit)
	if f.raw {
		r := RawCapture{Device: id, Seq: *seq, DeviceTimeMS: tms, RateHz: sizeRateHz, Red: make([]uint32, sizeChunk), IR: make([]uint32, sizeChunk)}
		for i := range f.red {
			r.Red[i], r.IR[i] = uint32(f.red[i]), uint32(f.ir[i])
		}
		b.Raw = append(b.Raw, r)
	}
	if *seq%4 == 0 {
		// An estimate's values: smooth physiology plus estimator jitter.
		s := float64(*seq / 4)
		b.Points = append(b.Points, Point{Device: id, TimeMS: tms + 250, Source: 1,
			SpO2:  97 + 0.8*math.Sin(s/90) + f.rng.NormFloat64()*0.4,
			Pulse: 72 + 3*math.Sin(s/40) + f.rng.NormFloat64()*1.5,
			PI:    2 + 0.2*math.Sin(s/60) + f.rng.NormFloat64()*0.05,
			SQI:   min(1, 0.93+f.rng.NormFloat64()*0.03),
			Ratio: 0.52 + f.rng.NormFloat64()*0.01})
	}
}

func BenchmarkStorageCost(b *testing.B) {
	for _, mode := range []struct {
		name    string
		raw     bool
		devices int
		seconds int64
	}{{"trend+ledger", false, 50, 3600}, {"capture-raw", true, 10, 600}} {
		b.Run(mode.name, func(b *testing.B) {
			var st, half *Stats
			for i := 0; i < b.N; i++ {
				db, _ := mustOpen(b)
				f := newSizeFill(mode.raw, mode.devices, mode.seconds)
				f.fill(b, db, 0, mode.seconds/2)
				var err error
				if half, err = db.Stats(); err != nil {
					b.Fatal(err)
				}
				f.fill(b, db, mode.seconds/2, mode.seconds)
				if st, err = db.Stats(); err != nil {
					b.Fatal(err)
				}
			}
			trend := st.Kind("trend").Bytes + st.Kind("recent").Bytes
			ledger := st.Kind("ledger").Bytes
			b.ReportMetric(st.PerDeviceDay(trend)/1e6, "trend_MB/devday")
			b.ReportMetric(st.PerDeviceDay(ledger)/1e6, "ledger_MB/devday")
			b.ReportMetric(st.PerDeviceDay(trend+ledger)/1e6, "trend+ledger_MB/devday")
			b.ReportMetric(st.PerDeviceDay(st.FileBytes)/1e6, "file_MB/devday")
			// The file's growth over the second half: what the days kept
			// cost on disk, free pages included, once the file has the
			// working room its writes need.
			b.ReportMetric(float64(st.FileBytes-half.FileBytes)/(st.DeviceDays-half.DeviceDays)/1e6, "growth_MB/devday")
			if mode.raw {
				b.ReportMetric(float64(st.Kind("raw").Bytes)/st.RawSeconds, "raw_B/devsec")
			}
		})
	}
}
