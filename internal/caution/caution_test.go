package caution

import (
	"encoding/csv"
	"encoding/xml"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"
)

// The caution says what pulsefleet is not, in one line.
func TestTextSaysNotCertified(t *testing.T) {
	for _, want := range []string{"NOT a certified medical alarm", "medical device", "patient care"} {
		if !strings.Contains(Text, want) {
			t.Errorf("Text lacks %q: %s", want, Text)
		}
	}
	if strings.ContainsAny(Text, "\r\n\",") {
		t.Errorf("Text must be one line without quotes or commas: %q", Text)
	}
	if !strings.HasPrefix(Comment, "# ") || strings.Count(Comment, "\n") != 1 || !strings.HasSuffix(Comment, "\n") {
		t.Errorf("Comment is not one '#' line: %q", Comment)
	}
}

// A CSV reader that skips '#' lines reads the header after the comment,
// and a YAML decoder ignores it.
func TestCommentIsSkippedByReaders(t *testing.T) {
	cr := csv.NewReader(strings.NewReader(Comment + "a,b\n1,2\n"))
	cr.Comment = '#'
	rows, err := cr.ReadAll()
	if err != nil || len(rows) != 2 || rows[0][0] != "a" {
		t.Fatalf("csv after the comment: %v, %v", rows, err)
	}
	// A reader that does not know the convention sees one cell.
	if rows, err := csv.NewReader(strings.NewReader(Comment)).ReadAll(); err != nil || len(rows) != 1 || len(rows[0]) != 1 {
		t.Errorf("the comment line as plain CSV: %q, %v; want one cell", rows, err)
	}
	var v map[string]int
	if err := yaml.Unmarshal([]byte(Comment+"a: 1\n"), &v); err != nil || v["a"] != 1 || len(v) != 1 {
		t.Fatalf("yaml after the comment: %v, %v", v, err)
	}
}

// The SVG note is well-formed XML carrying the whole text, and the caution
// needs no HTML escaping (so it can sit in a const HTML page as it is).
func TestSVGNoteAndHTML(t *testing.T) {
	var el struct {
		XMLName xml.Name
		Spans   []string `xml:"tspan"`
	}
	note := SVGNote(10, 20.5)
	if err := xml.Unmarshal([]byte(note), &el); err != nil {
		t.Fatal(err)
	}
	if el.XMLName.Local != "text" || strings.Join(el.Spans, " ") != Text {
		t.Errorf("SVGNote = <%s> %q, want the text", el.XMLName.Local, el.Spans)
	}
	if !strings.Contains(note, `y="20.5"`) || !strings.Contains(note, `class="caution"`) {
		t.Errorf("SVGNote: %s", note)
	}
	if HTML() != Text {
		t.Errorf("the caution needs HTML escaping: %q", HTML())
	}
}
