package export

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"math"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Invented pilot data: a ward bed on a device-computed summary stream, a
// home device streaming raw PPG (gateway estimates) and a bench device whose
// id needs escaping in CSV and mapping in FHIR.
var (
	start = time.Date(2026, 11, 30, 23, 59, 0, 0, time.UTC).UnixMilli() // the range crosses a day bucket
	nan   = math.NaN()
)

const (
	devWard  = "ward3-bed2"
	devHome  = "home-07"
	devBench = "lab bench/1, \"spare\""
)

type fixture struct {
	dir    string
	points map[string][]store.Point // as written
}

// writeStore writes the fixture with store.DB.Write and closes the store.
func writeStore(t testing.TB) fixture {
	t.Helper()
	dir := t.TempDir()
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	b := &store.Batch{Devices: []*store.Device{
		{ID: devWard, Model: "OX-proto-A", Firmware: "0.4.1", Mode: "summary"},
		{ID: devHome, Model: "OX-proto-B", Mode: "raw"},
		{ID: devBench},
	}}
	fx := fixture{dir: dir, points: map[string][]store.Point{}}
	add := func(p store.Point) {
		b.Points = append(b.Points, p)
		fx.points[p.Device] = append(fx.points[p.Device], p)
	}
	for i := int64(0); i < 120; i++ {
		p := store.Point{Device: devWard, TimeMS: start + i*1000, SpO2: 94 + float64(i%4), Pulse: 72.5, PI: 1.25, SQI: 0.9, Ratio: 0.61, Flags: 0, Source: 2}
		switch i {
		case 10:
			p.SpO2 = nan // a missing SpO2: no Observation, an empty cell
		case 11:
			p.Pulse, p.PI = nan, nan
		case 12:
			p.SpO2, p.Pulse, p.PI, p.SQI, p.Ratio, p.Flags = nan, nan, nan, nan, nan, 3 // nothing valid
		}
		add(p)
	}
	for i := int64(0); i < 30; i++ {
		add(store.Point{Device: devHome, TimeMS: start + 500 + i*1000, SpO2: 88.7, Pulse: 101, PI: 0.35, SQI: 0.62, Ratio: 0.85, Source: 1})
	}
	for i := int64(0); i < 5; i++ {
		add(store.Point{Device: devBench, TimeMS: start + 123 + i*1000, SpO2: 99, Pulse: 60, PI: 4, SQI: 1, Ratio: 0.45, Source: 1})
	}
	if err := db.Write(b); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	return fx
}

func openRO(t testing.TB, dir string) *store.DB {
	t.Helper()
	db, err := store.Open(dir, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { db.Close() })
	return db
}

func exportString(t testing.TB, db *store.DB, w Writer, buf *bytes.Buffer, opt Options) (string, Stats) {
	t.Helper()
	st, err := Run(context.Background(), db, w, opt)
	if err != nil {
		t.Fatal(err)
	}
	return buf.String(), st
}

// The CSV's header starts with the replay/tune trend columns (docs/contracts.md), so
// alarms.ReadTrendCSV (what replay and tune read) takes the export as is and
// gets back the stored values, with missing values still missing.
func TestCSVExportReplaysDirectly(t *testing.T) {
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	var buf bytes.Buffer
	out, st := exportString(t, db, NewCSVWriter(&buf), &buf, Options{})
	// The caution comes first as a '#' line (docs/contracts.md, "The caution
	// on every output"); replay's reader skips it.
	first, rest, _ := strings.Cut(out, "\n")
	if first+"\n" != caution.Comment {
		t.Errorf("first line %q, want the caution comment", first)
	}
	if header, _, _ := strings.Cut(rest, "\n"); !strings.HasPrefix(header, "t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi") {
		t.Fatalf("header %q does not start with the trend columns", header)
	}
	if st.Points != 155 || st.Devices != 3 {
		t.Errorf("stats %+v, want 155 points of 3 devices", st)
	}
	trends, err := alarms.ReadTrendCSV(strings.NewReader(out))
	if err != nil {
		t.Fatalf("replay's reader rejects the export: %v", err)
	}
	got := map[string]alarms.Trend{}
	for _, tr := range trends {
		got[tr.Device] = tr
	}
	for dev, pts := range fx.points {
		tr, ok := got[dev]
		if !ok || len(tr.Samples) != len(pts) {
			t.Fatalf("device %q: %d samples read back, want %d", dev, len(tr.Samples), len(pts))
		}
		for i, p := range pts {
			s := tr.Samples[i]
			if s.T != float64(p.TimeMS)/1000 {
				t.Errorf("%s[%d]: t_s %v, want %v", dev, i, s.T, float64(p.TimeMS)/1000)
			}
			for _, c := range []struct {
				name      string
				got, want float64
			}{{"spo2", s.SpO2, p.SpO2}, {"pulse", s.Pulse, p.Pulse}, {"pi", s.PI, p.PI}, {"sqi", s.SQI, p.SQI}} {
				if math.IsNaN(c.want) != math.IsNaN(c.got) || (!math.IsNaN(c.want) && float32(c.got) != float32(c.want)) {
					t.Errorf("%s[%d] %s = %v, stored %v", dev, i, c.name, c.got, c.want)
				}
			}
		}
	}
	// The all-missing row: every value cell empty, flags and source kept.
	wantRow := strconv.FormatInt((start+12_000)/1000, 10) + ",ward3-bed2,,,,,,3,device,"
	if !strings.Contains(out, "\n"+wantRow+"\n") {
		t.Errorf("no row %q for the all-missing point", wantRow)
	}
	// The bench id is quoted per RFC 4180.
	if !strings.Contains(out, `,"lab bench/1, ""spare""",99,60,4,1,0.45,0,gateway`) {
		t.Errorf("bench device row not quoted as RFC 4180 asks:\n%s", out[len(out)-300:])
	}
}

func TestSelectionByDeviceAndRange(t *testing.T) {
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	var buf bytes.Buffer
	// [start+30 s, start+90 s) holds 60 ward points and none of home's (+0.5 .. +29.5 s).
	out, st := exportString(t, db, NewCSVWriter(&buf), &buf, Options{Devices: []string{devWard, devHome}, FromMS: start + 30_000, ToMS: start + 90_000})
	if st.Points != 60 || st.Devices != 2 {
		t.Errorf("stats %+v, want 60 points of 2 devices", st)
	}
	lines := strings.Split(strings.TrimSpace(strings.TrimPrefix(out, caution.Comment)), "\n")
	if len(lines) != 61 || !strings.HasPrefix(lines[1], strconv.FormatInt((start+30_000)/1000, 10)+",") ||
		!strings.HasPrefix(lines[60], strconv.FormatInt((start+89_000)/1000, 10)+",") {
		t.Errorf("range [from, to) not respected: %d lines, first %q, last %q", len(lines), lines[1], lines[len(lines)-1])
	}
	_, err := Run(context.Background(), db, NewCSVWriter(&bytes.Buffer{}), Options{Devices: []string{"ward9-bed1"}})
	if err == nil || !strings.Contains(err.Error(), `device "ward9-bed1" is not in the store`) || !strings.Contains(err.Error(), devWard) {
		t.Errorf("unknown device: error %v, want it named with the known ones", err)
	}
	_, err = Run(context.Background(), db, NewCSVWriter(&bytes.Buffer{}), Options{FromMS: start, ToMS: start})
	if err == nil || !strings.Contains(err.Error(), "--to must be after --from") {
		t.Errorf("empty range: error %v", err)
	}
}

func TestCancelStopsTheExport(t *testing.T) {
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	ctx, cancel := context.WithCancel(context.Background())
	n := 0
	_, err := Run(ctx, db, NewCSVWriter(&bytes.Buffer{}), Options{ProgressEvery: 10, Progress: func(p Progress) {
		if n++; p.Points >= 20 {
			cancel()
		}
	}})
	if !errors.Is(err, context.Canceled) {
		t.Fatalf("error %v, want context.Canceled", err)
	}
}

// Minimal decoding of what the test checks.
type bundle struct {
	ResourceType string `json:"resourceType"`
	Type         string `json:"type"`
	Timestamp    string `json:"timestamp"`
	Entry        []struct {
		FullURL  string          `json:"fullUrl"`
		Resource json.RawMessage `json:"resource"`
	} `json:"entry"`
}

type coding struct{ System, Code, Display string }

type observation struct {
	ResourceType string
	ID           string
	Status       string
	Category     []struct{ Coding []coding }
	Code         struct {
		Coding []coding
		Text   string
	}
	EffectiveDateTime string
	Device            struct{ Reference string }
	ValueQuantity     struct {
		Value        float64
		Unit, System string
		Code         string
	}
	Identifier []struct{ Value string } // Device
}

func TestFHIRExportValidatesAndCarriesTheCodes(t *testing.T) {
	schema := compileFHIRSchema(t, fhirSchemaPath(t))
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	var buf bytes.Buffer
	ts := time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)
	out, st := exportString(t, db, NewFHIRWriter(&buf, FHIROptions{Timestamp: ts}), &buf, Options{})
	if st.Points != 155 {
		t.Errorf("exported %d points, want 155", st.Points)
	}
	if err := validateJSON(schema, out); err != nil {
		t.Fatalf("export does not validate against the FHIR R4 schema: %v", err)
	}
	var b bundle
	if err := json.Unmarshal([]byte(out), &b); err != nil {
		t.Fatal(err)
	}
	if b.ResourceType != "Bundle" || b.Type != "collection" || b.Timestamp != "2026-12-01T08:00:00Z" {
		t.Errorf("bundle head %q %q %q", b.ResourceType, b.Type, b.Timestamp)
	}
	devices := map[string]string{} // "Device/ID" -> identifier
	byCode := map[string]int{}
	seenIDs := map[string]bool{}
	idRE := regexp.MustCompile(`^[A-Za-z0-9\-\.]{1,64}$`) // FHIR R4 id datatype
	for i, e := range b.Entry {
		var o observation
		if err := json.Unmarshal(e.Resource, &o); err != nil {
			t.Fatal(err)
		}
		if !idRE.MatchString(o.ID) || seenIDs[o.ResourceType+"/"+o.ID] {
			t.Errorf("entry %d: id %q is not a unique FHIR id", i, o.ID)
		}
		seenIDs[o.ResourceType+"/"+o.ID] = true
		if o.ResourceType == "Device" {
			if len(devices) != i {
				t.Errorf("Device entry %d after an Observation: devices must come first", i)
			}
			devices["Device/"+o.ID] = o.Identifier[0].Value
			continue
		}
		if _, ok := devices[o.Device.Reference]; !ok {
			t.Errorf("entry %d: device reference %q has no Device entry", i, o.Device.Reference)
		}
		if o.Status != "final" {
			t.Errorf("entry %d: status %q", i, o.Status)
		}
		eff, err := time.Parse(time.RFC3339, o.EffectiveDateTime)
		if err != nil || eff.UnixMilli() < start || eff.UnixMilli() > start+120_000 {
			t.Errorf("entry %d: effectiveDateTime %q (%v)", i, o.EffectiveDateTime, err)
		}
		var codes []string
		for _, c := range o.Code.Coding {
			codes = append(codes, c.System+"|"+c.Code)
		}
		key := strings.Join(codes, " ")
		byCode[key]++
		q := o.ValueQuantity
		vital := len(o.Category) == 1 && len(o.Category[0].Coding) == 1 &&
			o.Category[0].Coding[0] == coding{"http://terminology.hl7.org/CodeSystem/observation-category", "vital-signs", "Vital Signs"}
		switch key {
		// docs/references.md, Interoperability codes: LOINC 59408-5 and 2708-6 for
		// SpO2, 8867-4 for heart rate, UCUM "%" and "/min" (seen).
		case "http://loinc.org|59408-5 http://loinc.org|2708-6":
			if q.Unit != "%" || q.Code != "%" || q.System != "http://unitsofmeasure.org" || !vital || q.Value < 88 || q.Value > 99 {
				t.Errorf("SpO2 entry %d: %+v vital=%v", i, q, vital)
			}
		case "http://loinc.org|8867-4":
			if q.Unit != "/min" || q.Code != "/min" || q.System != "http://unitsofmeasure.org" || !vital {
				t.Errorf("pulse entry %d: %+v vital=%v", i, q, vital)
			}
		// docs/references.md: ISO/IEEE 11073-10101 150448 MDC_PULS_OXIM_PERF_REL (derived).
		case "urn:iso:std:iso:11073:10101|150448":
			if q.Unit != "%" || q.Code != "%" || len(o.Category) != 0 {
				t.Errorf("PI entry %d: %+v, category %v (PI is no FHIR vital sign)", i, q, o.Category)
			}
		default:
			t.Errorf("entry %d: unexpected codes %q", i, key)
		}
	}
	if len(devices) != 3 || devices["Device/"+FHIRID(devBench)] != devBench {
		t.Errorf("Device entries %v", devices)
	}
	// Valid values in the fixture: ward 120 points, SpO2 missing at 10 and 12,
	// pulse and PI missing at 11 and 12; home 30 and bench 5 complete.
	want := map[string]int{
		"http://loinc.org|59408-5 http://loinc.org|2708-6": 118 + 30 + 5,
		"http://loinc.org|8867-4":                          118 + 30 + 5,
		"urn:iso:std:iso:11073:10101|150448":               118 + 30 + 5,
	}
	for k, n := range want {
		if byCode[k] != n {
			t.Errorf("%d Observations with %s, want %d", byCode[k], k, n)
		}
	}
}

// The validator is really validating: a broken Observation fails.
func TestFHIRSchemaRejectsBrokenResources(t *testing.T) {
	schema := compileFHIRSchema(t, fhirSchemaPath(t))
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	var buf bytes.Buffer
	out, _ := exportString(t, db, NewFHIRWriter(&buf, FHIROptions{BaseURL: "https://fhir.pilot.invalid/r4/"}), &buf, Options{Devices: []string{devHome}})
	if err := validateJSON(schema, out); err != nil {
		t.Fatalf("export with fullUrls does not validate: %v", err)
	}
	if !strings.Contains(out, `"fullUrl":"https://fhir.pilot.invalid/r4/Device/home-07"`) {
		t.Errorf("no fullUrl for the Device")
	}
	for _, broken := range []struct{ from, to string }{
		{`"status":"final"`, `"status":"done"`},                                   // not in the R4 value set
		{`"effectiveDateTime":"2026-11-30T`, `"effectiveDateTime":"30/11/2026 T`}, // not a FHIR dateTime
		{`"resourceType":"Observation"`, `"resourceType":"Observaton"`},           // no such resource
	} {
		bad := strings.Replace(out, broken.from, broken.to, 1)
		if bad == out {
			t.Fatalf("fixture has no %q", broken.from)
		}
		if err := validateJSON(schema, bad); err == nil {
			t.Errorf("schema accepted %s", broken.to)
		}
	}
}

// The bundle streams: entries reach the io.Writer before Close.
func TestFHIRWriterStreams(t *testing.T) {
	var sink countingWriter
	w := NewFHIRWriter(&sink, FHIROptions{})
	if err := w.Begin([]store.Device{{ID: "d"}}); err != nil {
		t.Fatal(err)
	}
	for i := int64(0); i < 2000; i++ {
		if err := w.Point(&store.Point{Device: "d", TimeMS: start + i*1000, SpO2: 97, Pulse: 70, PI: 2}); err != nil {
			t.Fatal(err)
		}
	}
	if sink.n == 0 {
		t.Fatalf("nothing written before Close: the bundle is held in memory")
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	if w.Entries() != 1+3*2000 {
		t.Errorf("%d entries, want %d", w.Entries(), 1+3*2000)
	}
	if err := w.Point(&store.Point{Device: "d"}); err == nil {
		t.Errorf("Point after Close accepted")
	}
}

func TestEmptyExportsAreValidDocuments(t *testing.T) {
	var buf bytes.Buffer
	f := NewFHIRWriter(&buf, FHIROptions{})
	if err := f.Begin(nil); err != nil {
		t.Fatal(err)
	}
	if err := f.Close(); err != nil {
		t.Fatal(err)
	}
	// FHIR JSON never has empty arrays: no "entry":[] .
	if got := strings.TrimSpace(buf.String()); got != `{"resourceType":"Bundle","type":"collection"}` {
		t.Errorf("empty bundle %s", got)
	}
	buf.Reset()
	c := NewCSVWriter(&buf)
	c.Begin(nil)
	c.Close()
	if buf.String() != caution.Comment+CSVHeader+"\n" {
		t.Errorf("empty csv %q", buf.String())
	}
}

func TestFHIRID(t *testing.T) {
	for _, tc := range []struct{ in, want string }{
		{"ward3-bed2", "ward3-bed2"},
		{"OX.proto.7", "OX.proto.7"},
	} {
		if got := FHIRID(tc.in); got != tc.want {
			t.Errorf("FHIRID(%q) = %q, want %q", tc.in, got, tc.want)
		}
	}
	idRE := regexp.MustCompile(`^[A-Za-z0-9\-\.]{1,40}$`)
	seen := map[string]string{}
	for _, in := range []string{"", "a b", "a_b", "a/b", "a-b", strings.Repeat("x", 40), strings.Repeat("x", 41), strings.Repeat("x", 42), "ü", devBench} {
		got := FHIRID(in)
		if !idRE.MatchString(got) {
			t.Errorf("FHIRID(%q) = %q, not a FHIR id of <= 40 characters", in, got)
		}
		if prev, dup := seen[got]; dup {
			t.Errorf("FHIRID(%q) = FHIRID(%q) = %q", in, prev, got)
		}
		seen[got] = in
	}
}

func TestAppendSeconds(t *testing.T) {
	for ms, want := range map[int64]string{0: "0", 1000: "1", 1500: "1.5", 1_700_000_000_123: "1700000000.123", 1_700_000_000_010: "1700000000.01", -1500: "-1.5"} {
		if got := string(appendSeconds(nil, ms)); got != want {
			t.Errorf("appendSeconds(%d) = %q, want %q", ms, got, want)
		}
	}
}

func TestProgressIsReported(t *testing.T) {
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	var got []Progress
	if _, err := Run(context.Background(), db, NewCSVWriter(&bytes.Buffer{}), Options{ProgressEvery: 50, Progress: func(p Progress) { got = append(got, p) }}); err != nil {
		t.Fatal(err)
	}
	last := got[len(got)-1]
	if !last.Done || last.Points != 155 || last.DeviceCount != 3 {
		t.Errorf("last progress %+v", last)
	}
	devs := []string{}
	for _, p := range got {
		if !p.Done && !slices.Contains(devs, p.Device) {
			devs = append(devs, p.Device)
		}
	}
	if !slices.Equal(devs, []string{devHome, devBench, devWard}) {
		t.Errorf("devices in progress %q, want sorted ids", devs)
	}
}

type countingWriter struct{ n int64 }

func (c *countingWriter) Write(p []byte) (int, error) { c.n += int64(len(p)); return len(p), nil }

// Every Device of the FHIR export carries the caution as an annotation, and
// every Observation points at such a Device in the same Bundle (the Bundle
// itself has no element for free text; docs/contracts.md, "The caution on
// every output"). No schema needed: this runs everywhere.
func TestFHIRExportCarriesTheCaution(t *testing.T) {
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	var buf bytes.Buffer
	out, st := exportString(t, db, NewFHIRWriter(&buf, FHIROptions{Timestamp: time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)}), &buf, Options{})
	var b struct {
		Entry []struct {
			Resource struct {
				ResourceType string `json:"resourceType"`
				ID           string `json:"id"`
				Note         []struct {
					Text string `json:"text"`
				} `json:"note"`
				Device struct {
					Reference string `json:"reference"`
				} `json:"device"`
			} `json:"resource"`
		} `json:"entry"`
	}
	if err := json.Unmarshal([]byte(out), &b); err != nil {
		t.Fatal(err)
	}
	cautioned := map[string]bool{}
	obs := 0
	for i, e := range b.Entry {
		r := e.Resource
		switch r.ResourceType {
		case "Device":
			if len(r.Note) == 0 || !strings.Contains(r.Note[0].Text, caution.Text) {
				t.Errorf("Device entry %d has no caution note: %+v", i, r.Note)
			}
			cautioned["Device/"+r.ID] = true
		case "Observation":
			obs++
			if !cautioned[r.Device.Reference] {
				t.Fatalf("Observation entry %d points at %q, which carries no caution", i, r.Device.Reference)
			}
		}
	}
	if len(cautioned) != 3 || int64(obs) < st.Points {
		t.Errorf("%d cautioned devices, %d Observations for %d points; want 3 devices", len(cautioned), obs, st.Points)
	}
}
