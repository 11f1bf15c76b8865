package export

import (
	"bufio"
	"encoding/json"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"hash/fnv"
	"io"
	"math"
	"strconv"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Code systems and codes (docs/references.md, "Interoperability codes").
const (
	SystemLOINC = "http://loinc.org"
	SystemUCUM  = "http://unitsofmeasure.org"
	SystemMDC   = "urn:iso:std:iso:11073:10101"
	// SystemObservationCategory is the FHIR R4 observation-category code system.
	SystemObservationCategory = "http://terminology.hl7.org/CodeSystem/observation-category"

	LOINCSpO2Pulseox = "59408-5" // Oxygen saturation in Arterial blood by Pulse oximetry
	LOINCSaO2        = "2708-6"  // Oxygen saturation in Arterial blood
	LOINCHeartRate   = "8867-4"  // Heart rate
	MDCPerfRel       = "150448"  // MDC_PULS_OXIM_PERF_REL, perfusion index
)

// FHIROptions tunes the FHIR export. The zero value is usable.
type FHIROptions struct {
	// Timestamp is the Bundle's timestamp (when it was assembled); zero
	// leaves it out. The command passes the wall clock.
	Timestamp time.Time
	// BaseURL, when set (e.g. "https://fhir.example.org/r4"), gives every
	// entry a fullUrl BASE/TYPE/ID so references resolve inside the bundle;
	// empty leaves fullUrl out.
	BaseURL string
	// SkipPI leaves out the perfusion index Observations (they carry an
	// ISO/IEEE 11073 code only; LOINC has no perfusion index code).
	SkipPI bool
	// PatientSystem is the identifier system (a URI the study team
	// chooses, e.g. https://study.example.org/participant-id) of the Patient
	// resources that stand for participants; empty leaves system out.
	PatientSystem string
	// Incomplete, when not empty, says the export lacks history (a gateway
	// could not be read): Begin writes an OperationOutcome entry first, one
	// issue per note, severity warning, code "incomplete" (FHIR's issue
	// type for "not all data sources ... could be reached").
	Incomplete []string
}

// FHIRWriter writes an HL7 FHIR R4 Bundle (type collection) of Device,
// Patient (one per participant, pseudonymous identifier only) and
// Observation resources as JSON, one entry at a time: it never holds more
// than one entry in memory. Observations have ids DEVICEID.TIMEMS.KIND
// (KIND spo2, pr or pi), so a re-export of the same data has the same ids.
type FHIRWriter struct {
	w       *bufio.Writer
	opt     FHIROptions
	entries int
	buf     []byte
	dev     string // device of the cached fields
	devRef  []byte // JSON object {"reference":"Device/ID"}
	devID   string
	begun   bool
	closed  bool

	baseJSON []byte // opt.BaseURL as a JSON string
	id       []byte // scratch for Observation ids

	subjRef  []byte          // {"reference":"Patient/ID"} of the current participant, nil for none
	patients map[string]bool // Patient entries written
}

// NewFHIRWriter returns a FHIRWriter writing to w (buffered; Close flushes).
func NewFHIRWriter(w io.Writer, opt FHIROptions) *FHIRWriter {
	opt.BaseURL = strings.TrimRight(opt.BaseURL, "/")
	base, _ := json.Marshal(opt.BaseURL)
	return &FHIRWriter{w: bufio.NewWriterSize(w, 64<<10), opt: opt, buf: make([]byte, 0, 2048), baseJSON: base}
}

// Begin writes the Bundle's opening and one Device entry per device.
func (f *FHIRWriter) Begin(devices []store.Device) error {
	if f.closed || f.begun {
		return errClosed
	}
	f.begun = true
	b := append(f.buf[:0], `{"resourceType":"Bundle","type":"collection"`...)
	if !f.opt.Timestamp.IsZero() {
		b = append(b, `,"timestamp":"`...)
		b = f.opt.Timestamp.UTC().AppendFormat(b, time.RFC3339Nano)
		b = append(b, '"')
	}
	if _, err := f.w.Write(b); err != nil {
		return fmt.Errorf("fhir: %w", err)
	}
	if len(f.opt.Incomplete) > 0 {
		if err := f.entry("OperationOutcome", []byte(incompleteID), incompleteOutcome(f.opt.Incomplete)); err != nil {
			return err
		}
	}
	for _, d := range devices {
		res, err := json.Marshal(deviceResource(d))
		if err != nil {
			return fmt.Errorf("fhir: device %q: %w", d.ID, err)
		}
		if err := f.entry("Device", []byte(FHIRID(d.ID)), res); err != nil {
			return err
		}
	}
	return nil
}

// entry writes one Bundle entry around the resource JSON res.
func (f *FHIRWriter) entry(typ string, id, res []byte) error {
	sep := `,`
	if f.entries == 0 {
		sep = `,"entry":[`
	}
	f.entries++
	if _, err := f.w.WriteString(sep); err != nil {
		return fmt.Errorf("fhir: %w", err)
	}
	f.w.WriteString(`{`)
	if f.opt.BaseURL != "" {
		// BaseURL is JSON-quoted once in NewFHIRWriter; ids need no escaping.
		f.w.WriteString(`"fullUrl":`)
		f.w.Write(f.baseJSON[:len(f.baseJSON)-1]) // without its closing quote
		f.w.WriteString("/" + typ + "/")
		f.w.Write(id)
		f.w.WriteString(`",`)
	}
	f.w.WriteString(`"resource":`)
	f.w.Write(res)
	if _, err := f.w.WriteString("}\n"); err != nil {
		return fmt.Errorf("fhir: %w", err)
	}
	return nil
}

// Participant makes the Observations that follow reference pid's Patient
// resource as their subject ("" = none), writing that Patient entry the
// first time: it carries only the pseudonymous identifier, nothing else
// about the person.
func (f *FHIRWriter) Participant(pid string) error {
	if f.closed || !f.begun {
		return errClosed
	}
	if pid == "" {
		f.subjRef = nil
		return nil
	}
	id := FHIRID(pid)
	ref, _ := json.Marshal(map[string]string{"reference": "Patient/" + id})
	f.subjRef = ref
	if f.patients[id] {
		return nil
	}
	if f.patients == nil {
		f.patients = map[string]bool{}
	}
	f.patients[id] = true
	res, err := json.Marshal(fhirPatient{ResourceType: "Patient", ID: id,
		Identifier: []fhirIdentifier{{System: f.opt.PatientSystem, Value: pid}}})
	if err != nil {
		return fmt.Errorf("fhir: participant %q: %w", pid, err)
	}
	return f.entry("Patient", []byte(id), res)
}

// fhirPatient is a FHIR R4 Patient reduced to its id and the participant's
// pseudonymous identifier.
type fhirPatient struct {
	ResourceType string           `json:"resourceType"`
	ID           string           `json:"id"`
	Identifier   []fhirIdentifier `json:"identifier"`
}

// Point writes one Observation per valid value of p (SpO2, pulse rate,
// perfusion index); a point without valid values writes nothing.
func (f *FHIRWriter) Point(p *store.Point) error {
	if f.closed || !f.begun {
		return errClosed
	}
	if p.Device != f.dev || f.devRef == nil {
		f.dev, f.devID = p.Device, FHIRID(p.Device)
		ref, _ := json.Marshal(map[string]string{"reference": "Device/" + f.devID})
		f.devRef = ref
	}
	for _, k := range kinds {
		v := k.value(p)
		if math.IsNaN(v) || math.IsInf(v, 0) || (k.skip && f.opt.SkipPI) {
			continue
		}
		id := append(f.id[:0], f.devID...)
		id = append(id, '.')
		id = strconv.AppendInt(id, p.TimeMS, 10)
		id = append(id, '.')
		id = append(id, k.name...)
		f.id = id
		b := append(f.buf[:0], `{"resourceType":"Observation","id":"`...)
		b = append(b, id...)
		b = append(b, `","status":"final",`...)
		b = append(b, k.head...)
		b = append(b, `,"effectiveDateTime":"`...)
		b = time.UnixMilli(p.TimeMS).UTC().AppendFormat(b, "2006-01-02T15:04:05.000Z07:00")
		b = append(b, '"')
		if f.subjRef != nil {
			b = append(b, `,"subject":`...)
			b = append(b, f.subjRef...)
		}
		b = append(b, `,"device":`...)
		b = append(b, f.devRef...)
		if m := methodText(p.Source); m != "" {
			b = append(b, `,"method":{"text":"`...)
			b = append(b, m...)
			b = append(b, `"}`...)
		}
		b = append(b, `,"valueQuantity":{"value":`...)
		b = strconv.AppendFloat(b, v, 'f', -1, 32)
		b = append(b, k.unit...)
		b = append(b, '}', '}')
		f.buf = b
		if err := f.entry("Observation", id, b); err != nil {
			return err
		}
	}
	return nil
}

// Close ends the Bundle and flushes.
func (f *FHIRWriter) Close() error {
	if f.closed {
		return errClosed
	}
	f.closed = true
	end := "}\n"
	if f.entries > 0 {
		end = "]}\n"
	}
	if !f.begun {
		end = `{"resourceType":"Bundle","type":"collection"}` + "\n"
	}
	f.w.WriteString(end)
	if err := f.w.Flush(); err != nil {
		return fmt.Errorf("fhir: %w", err)
	}
	return nil
}

// Entries is the number of Bundle entries written so far.
func (f *FHIRWriter) Entries() int { return f.entries }

// kind is one exported quantity: fixed JSON for its category and code, and
// for its unit (after the value).
type kind struct {
	name  string
	value func(*store.Point) float64
	head  string // "category":[...],"code":{...}
	unit  string // ,"unit":...,"system":...,"code":...
	skip  bool   // left out with SkipPI
}

const vitalSigns = `"category":[{"coding":[{"system":"` + SystemObservationCategory + `","code":"vital-signs","display":"Vital Signs"}]}]`

var kinds = []kind{
	{
		name:  "spo2",
		value: func(p *store.Point) float64 { return p.SpO2 },
		head: vitalSigns + `,"code":{"coding":[` +
			`{"system":"` + SystemLOINC + `","code":"` + LOINCSpO2Pulseox + `","display":"Oxygen saturation in Arterial blood by Pulse oximetry"},` +
			`{"system":"` + SystemLOINC + `","code":"` + LOINCSaO2 + `","display":"Oxygen saturation in Arterial blood"}],"text":"SpO2"}`,
		unit: `,"unit":"%","system":"` + SystemUCUM + `","code":"%"`,
	},
	{
		name:  "pr",
		value: func(p *store.Point) float64 { return p.Pulse },
		head: vitalSigns + `,"code":{"coding":[` +
			`{"system":"` + SystemLOINC + `","code":"` + LOINCHeartRate + `","display":"Heart rate"}],"text":"Pulse rate"}`,
		unit: `,"unit":"/min","system":"` + SystemUCUM + `","code":"/min"`,
	},
	{
		name:  "pi",
		value: func(p *store.Point) float64 { return p.PI },
		head: `"code":{"coding":[` +
			`{"system":"` + SystemMDC + `","code":"` + MDCPerfRel + `","display":"MDC_PULS_OXIM_PERF_REL"}],"text":"Perfusion index"}`,
		unit: `,"unit":"%","system":"` + SystemUCUM + `","code":"%"`,
		skip: true,
	},
}

func methodText(source uint8) string {
	switch source {
	case 1:
		return "pulsefleet gateway estimate from raw PPG"
	case 2:
		return "computed by the device"
	}
	return ""
}

// FHIRID maps a device id to a FHIR resource id ([A-Za-z0-9-.]{1,64}): ids
// that already fit in 40 characters are kept; others keep their first
// characters (others replaced by '-') and get a hash suffix, so different
// device ids never share a resource id in practice. 40 leaves room for the
// Observation suffix ".TIMEMS.KIND".
func FHIRID(device string) string {
	const maxLen = 40
	ok := device != "" && len(device) <= maxLen
	for i := 0; ok && i < len(device); i++ {
		ok = idChar(device[i])
	}
	if ok {
		return device
	}
	h := fnv.New64a()
	h.Write([]byte(device))
	suffix := fmt.Sprintf("-%012x", h.Sum64()&0xffffffffffff) // 13 characters
	keep := min(len(device), maxLen-len(suffix))
	b := make([]byte, 0, maxLen)
	for i := 0; i < keep; i++ {
		c := device[i]
		if !idChar(c) {
			c = '-'
		}
		b = append(b, c)
	}
	return string(b) + suffix
}

func idChar(c byte) bool {
	return c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '-' || c == '.'
}

// FHIR R4 Device, reduced to the elements the export fills.
type fhirDevice struct {
	ResourceType string           `json:"resourceType"`
	ID           string           `json:"id"`
	Identifier   []fhirIdentifier `json:"identifier"`
	Status       string           `json:"status,omitempty"`
	DeviceName   []fhirDeviceName `json:"deviceName,omitempty"`
	Version      []fhirVersion    `json:"version,omitempty"`
	Note         []fhirNote       `json:"note"`
}

type fhirIdentifier struct {
	System string `json:"system,omitempty"`
	Value  string `json:"value"`
}

type fhirDeviceName struct {
	Name string `json:"name"`
	Type string `json:"type"`
}

type fhirVersion struct {
	Value string `json:"value"`
}

type fhirNote struct {
	Text string `json:"text"`
}

func deviceResource(d store.Device) fhirDevice {
	r := fhirDevice{
		ResourceType: "Device",
		ID:           FHIRID(d.ID),
		Identifier:   []fhirIdentifier{{Value: d.ID}},
		Note:         []fhirNote{{Text: "Prototype pulse oximeter in a pilot. " + caution.Text}},
	}
	if m := strings.TrimSpace(d.Model); m != "" {
		r.DeviceName = []fhirDeviceName{{Name: m, Type: "model-name"}}
	}
	if fw := strings.TrimSpace(d.Firmware); fw != "" {
		r.Version = []fhirVersion{{Value: fw}}
	}
	return r
}

// incompleteID is the id of the OperationOutcome of an incomplete export.
const incompleteID = "export-incomplete"

// incompleteOutcome is an OperationOutcome with one warning issue of code
// "incomplete" per note.
func incompleteOutcome(notes []string) []byte {
	type issue struct {
		Severity    string `json:"severity"`
		Code        string `json:"code"`
		Diagnostics string `json:"diagnostics"`
	}
	oo := struct {
		ResourceType string  `json:"resourceType"`
		ID           string  `json:"id"`
		Issue        []issue `json:"issue"`
	}{ResourceType: "OperationOutcome", ID: incompleteID}
	for _, n := range notes {
		oo.Issue = append(oo.Issue, issue{Severity: "warning", Code: "incomplete", Diagnostics: n})
	}
	b, _ := json.Marshal(oo) // strings only: cannot fail
	return b
}
