package export

import (
	"bytes"
	"encoding/csv"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"regexp"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

var fhirIDRE = regexp.MustCompile(`^[A-Za-z0-9\-\.]{1,40}$`)

// Any device id maps to a valid FHIR id, the same every time, and ids that
// are already valid (and short enough) are kept.
func FuzzFHIRID(f *testing.F) {
	for _, s := range []string{"", "ward3-bed2", "lab bench/1", "ü", "a.b-c", "0123456789012345678901234567890123456789x", "\x00"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, id string) {
		got := FHIRID(id)
		if !fhirIDRE.MatchString(got) || FHIRID(id) != got {
			t.Fatalf("FHIRID(%q) = %q", id, got)
		}
		if fhirIDRE.MatchString(id) && got != id {
			t.Fatalf("valid id %q changed to %q", id, got)
		}
	})
}

// Any device id survives the CSV writer: encoding/csv (skipping the caution
// line) reads back the same id, the same number of fields and the values.
func FuzzCSVDeviceField(f *testing.F) {
	for _, s := range []string{"ward3-bed2", "a,b", `say "hi"`, " lead", "line\nbreak", "cr\r", "\t", "#x"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, id string) {
		var buf bytes.Buffer
		w := NewCSVWriter(&buf)
		w.Begin(nil)
		if err := w.Point(&store.Point{Device: id, TimeMS: 1500, SpO2: 97, Pulse: 60, PI: 1, SQI: 0.5, Ratio: 0.5, Source: 2}); err != nil {
			t.Fatal(err)
		}
		w.Close()
		if !strings.HasPrefix(buf.String(), caution.Comment) {
			t.Fatalf("export CSV does not start with the caution line:\n%s", buf.String())
		}
		cr := csv.NewReader(&buf)
		cr.Comment = '#' // as every pulsefleet CSV reader does
		recs, err := cr.ReadAll()
		if err != nil {
			t.Fatalf("id %q: %v\n%s", id, err, buf.String())
		}
		// encoding/csv turns \r\n inside a quoted field into \n; the
		// exported bytes are still the id's (a reader quirk, not lost data).
		if bytes.ContainsRune([]byte(id), '\r') {
			return
		}
		if len(recs) != 2 || len(recs[1]) != 10 || recs[1][1] != id || recs[1][0] != "1.5" || recs[1][2] != "97" {
			t.Fatalf("id %q read back as %q", id, recs)
		}
	})
}
