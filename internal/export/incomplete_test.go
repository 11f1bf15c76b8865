package export

import (
	"bytes"
	"encoding/json"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/caution"
)

// An export that lacks a gateway's history says so in the document itself:
// the FHIR Bundle starts with an OperationOutcome (issue code "incomplete",
// which FHIR R4 defines for sources that could not be reached) and still
// validates against the R4 schema; the CSV carries "# incomplete:" comment
// lines after the caution and still replays.
func TestIncompleteExportsSaySoAndStayValid(t *testing.T) {
	schema := compileFHIRSchema(t, fhirSchemaPath(t))
	fx := writeStore(t)
	db := openRO(t, fx.dir)
	notes := []string{"gateway 10.0.0.2:7400 could not be read: connection refused", "device ward3-bed2: messages 1-99\nnot held"}
	var buf bytes.Buffer
	out, _ := exportString(t, db, NewFHIRWriter(&buf, FHIROptions{Incomplete: notes, BaseURL: "https://fhir.example.org/r4"}), &buf, Options{})
	if err := validateJSON(schema, out); err != nil {
		t.Fatalf("incomplete export does not validate against the FHIR R4 schema: %v", err)
	}
	var b struct {
		Entry []struct {
			FullURL  string          `json:"fullUrl"`
			Resource json.RawMessage `json:"resource"`
		} `json:"entry"`
	}
	if err := json.Unmarshal([]byte(out), &b); err != nil {
		t.Fatal(err)
	}
	var oo struct {
		ResourceType string `json:"resourceType"`
		Issue        []struct{ Severity, Code, Diagnostics string }
	}
	if err := json.Unmarshal(b.Entry[0].Resource, &oo); err != nil {
		t.Fatal(err)
	}
	if oo.ResourceType != "OperationOutcome" || len(oo.Issue) != 2 || oo.Issue[0].Code != "incomplete" ||
		oo.Issue[0].Severity != "warning" || oo.Issue[0].Diagnostics != notes[0] {
		t.Errorf("first entry %s, want an OperationOutcome with one incomplete warning per note", b.Entry[0].Resource)
	}
	if !strings.HasSuffix(b.Entry[0].FullURL, "/OperationOutcome/export-incomplete") {
		t.Errorf("fullUrl %q", b.Entry[0].FullURL)
	}

	buf.Reset()
	c := NewCSVWriter(&buf)
	c.SetIncomplete(notes)
	out, st := exportString(t, db, c, &buf, Options{})
	wantHead := caution.Comment + "# incomplete: " + notes[0] + "\n# incomplete: device ward3-bed2: messages 1-99 not held\n" + CSVHeader + "\n"
	if !strings.HasPrefix(out, wantHead) {
		t.Errorf("csv head %q, want %q", out[:min(len(out), 300)], wantHead)
	}
	trends, err := alarms.ReadTrendCSV(strings.NewReader(out))
	if err != nil {
		t.Fatalf("incomplete csv does not replay: %v", err)
	}
	var n int64
	for _, tr := range trends {
		n += int64(len(tr.Samples))
	}
	if n != st.Points {
		t.Errorf("replayed %d points of %d", n, st.Points)
	}
}
