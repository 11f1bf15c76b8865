package export

import (
	"context"
	"fmt"
	"io"
	"math"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// benchStore writes devices x hours of 1 Hz trend (invented values) and
// reopens the store read-only, as the export command does.
func benchStore(b *testing.B, devices, hours int) (*store.DB, int64) {
	b.Helper()
	dir := b.TempDir()
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		b.Fatal(err)
	}
	var n int64
	for d := 0; d < devices; d++ {
		batch := &store.Batch{Devices: []*store.Device{{ID: fmt.Sprintf("ward%d-bed%02d", d%4, d)}}}
		id := batch.Devices[0].ID
		for s := 0; s < hours*3600; s++ {
			batch.Points = append(batch.Points, store.Point{Device: id, TimeMS: start + int64(s)*1000,
				SpO2: 95 + 2*math.Sin(float64(s)/300), Pulse: 70 + float64(s%13), PI: 1.5, SQI: 0.9, Ratio: 0.6, Source: 1})
			if len(batch.Points) == 50_000 {
				if err := db.Write(batch); err != nil {
					b.Fatal(err)
				}
				n += int64(len(batch.Points))
				batch.Reset()
			}
		}
		n += int64(len(batch.Points))
		if err := db.Write(batch); err != nil {
			b.Fatal(err)
		}
	}
	db.Close()
	ro, err := store.Open(dir, store.Options{ReadOnly: true})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { ro.Close() })
	return ro, n
}

// BenchmarkExport reports points/s for a store of 8 devices x 6 h of 1 Hz
// trend (172,800 points) written to io.Discard.
func BenchmarkExport(b *testing.B) {
	db, n := benchStore(b, 8, 6)
	for _, f := range []struct {
		name string
		w    func(io.Writer) Writer
	}{
		{"csv", func(w io.Writer) Writer { return NewCSVWriter(w) }},
		{"fhir", func(w io.Writer) Writer { return NewFHIRWriter(w, FHIROptions{}) }},
	} {
		b.Run(f.name, func(b *testing.B) {
			var cw countingWriter
			b.ReportAllocs()
			for b.Loop() {
				st, err := Run(context.Background(), db, f.w(&cw), Options{})
				if err != nil || st.Points != n {
					b.Fatalf("%+v %v, want %d points", st, err, n)
				}
			}
			b.ReportMetric(float64(n)*float64(b.N)/b.Elapsed().Seconds(), "points/s")
			b.ReportMetric(float64(cw.n)/float64(b.N)/float64(n), "bytes/point")
		})
	}
}
