package export

import (
	"bytes"
	"encoding/json"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/participants"
)

// Enrolments over writeStore's fixture (ward: 120 points at start+i s;
// home: 30 points at start+0.5+i s; bench: 5 points, nobody's):
//
//	P-0001  ward  start .. start+60 s     ward points 0..59   = 60
//	P-0001  home  start+10 s .. open      home points 10..29  = 20 (at +10.5 s ..; +9.5 s is before)
//	P-0002  ward  start+60 s .. open      ward points 60..119 = 60
func fixtureEnrolments() []participants.Interval {
	return []participants.Interval{
		{Participant: "P-0001", Device: devWard, FromMS: start, ToMS: start + 60_000},
		{Participant: "P-0001", Device: devHome, FromMS: start + 10_000},
		{Participant: "P-0002", Device: devWard, FromMS: start + 60_000},
	}
}

func TestCSVParticipantColumnAndStitching(t *testing.T) {
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	var buf bytes.Buffer
	out, st := exportString(t, db, NewCSVWriter(&buf), &buf, Options{Enrolments: fixtureEnrolments()})
	if st.Points != 155 {
		t.Fatalf("exported %d points, want 155", st.Points)
	}
	count := map[string]int{}
	for _, line := range strings.Split(strings.TrimSpace(out), "\n")[2:] {
		cells := strings.Split(line, ",")
		count[cells[1]+"/"+cells[len(cells)-1]]++
	}
	want := map[string]int{devWard + "/P-0001": 60, devWard + "/P-0002": 60, devHome + "/P-0001": 20, devHome + "/": 10}
	for k, n := range want {
		if count[k] != n {
			t.Errorf("%s: %d rows, want %d (all: %v)", k, count[k], n, count)
		}
	}

	// --participant P-0001: ward's 60, then home's 20, every row P-0001.
	buf.Reset()
	out, st = exportString(t, db, NewCSVWriter(&buf), &buf, Options{Enrolments: fixtureEnrolments(), Participant: "P-0001"})
	if st.Points != 80 {
		t.Errorf("P-0001 stitched: %d points, want 80", st.Points)
	}
	rows := strings.Split(strings.TrimSpace(out), "\n")[2:]
	if !strings.Contains(rows[59], devWard) || !strings.Contains(rows[60], devHome) {
		t.Errorf("stitch order: row 59 %q, row 60 %q", rows[59], rows[60])
	}
	for _, r := range rows {
		if !strings.HasSuffix(r, ",P-0001") {
			t.Fatalf("row %q is not P-0001's", r)
		}
	}
	if _, err := Run(t.Context(), db, NewCSVWriter(&buf), Options{Enrolments: fixtureEnrolments(), Participant: "P-0009"}); err == nil ||
		!strings.Contains(err.Error(), "P-0009 has no enrolment") {
		t.Errorf("unknown participant: %v", err)
	}
}

// Observations of enrolled devices reference a Patient that carries only
// the pseudonymous identifier (with the configured system); the Bundle
// validates against the official FHIR R4 schema.
func TestFHIRPatientReferences(t *testing.T) {
	schema := compileFHIRSchema(t, fhirSchemaPath(t))
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	var buf bytes.Buffer
	const sys = "https://study.example.org/participant-id"
	out, _ := exportString(t, db, NewFHIRWriter(&buf, FHIROptions{Timestamp: time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC), PatientSystem: sys}),
		&buf, Options{Enrolments: fixtureEnrolments()})
	if err := validateJSON(schema, out); err != nil {
		t.Fatalf("export with Patients does not validate against the FHIR R4 schema: %v", err)
	}
	var b struct {
		Entry []struct{ Resource json.RawMessage }
	}
	if err := json.Unmarshal([]byte(out), &b); err != nil {
		t.Fatal(err)
	}
	patients := map[string]string{}
	subjects := map[string]int{}
	for _, e := range b.Entry {
		var r struct {
			ResourceType string
			ID           string
			Identifier   []struct{ System, Value string }
			Subject      *struct{ Reference string }
			Device       struct{ Reference string }
		}
		if err := json.Unmarshal(e.Resource, &r); err != nil {
			t.Fatal(err)
		}
		switch r.ResourceType {
		case "Patient":
			var all map[string]any
			_ = json.Unmarshal(e.Resource, &all)
			if len(all) != 3 || len(r.Identifier) != 1 || r.Identifier[0].System != sys {
				t.Errorf("Patient carries more than its pseudonymous identifier: %s", e.Resource)
			}
			patients["Patient/"+r.ID] = r.Identifier[0].Value
		case "Observation":
			subj := ""
			if r.Subject != nil {
				subj = patients[r.Subject.Reference]
				if subj == "" {
					t.Fatalf("subject %q has no Patient entry before it", r.Subject.Reference)
				}
			}
			subjects[strings.TrimPrefix(r.Device.Reference, "Device/")+"/"+subj]++
		}
	}
	if len(patients) != 2 {
		t.Errorf("Patients %v, want P-0001 and P-0002", patients)
	}
	// Observations per point: ward 3 (SpO2, pulse, PI) except the fixture's
	// points 10 (2), 11 (1) and 12 (0), all P-0001's: 60*3-1-2-3 = 174 for
	// P-0001 and 180 for P-0002; home 3 per point: 60 for P-0001, 30 for none.
	for k, n := range map[string]int{devWard + "/P-0001": 174, devWard + "/P-0002": 180, devHome + "/P-0001": 60, devHome + "/": 30} {
		if subjects[k] != n {
			t.Errorf("%s: %d Observations, want %d (all %v)", k, subjects[k], n, subjects)
		}
	}
}
