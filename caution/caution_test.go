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
	if strings.ContainsAny(Text, "\r\n\"") {
		t.Errorf("Text must be one line without quotes: %q", Text)
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
	var v map[string]int
	if err := yaml.Unmarshal([]byte(Comment+"a: 1\n"), &v); err != nil || v["a"] != 1 || len(v) != 1 {
		t.Fatalf("yaml after the comment: %v, %v", v, err)
	}
}

// The SVG note is well-formed XML carrying the text.
func TestSVGNote(t *testing.T) {
	var el struct {
		XMLName xml.Name
		Body    string `xml:",chardata"`
	}
	if err := xml.Unmarshal([]byte(SVGNote(10, 20.5)), &el); err != nil {
		t.Fatal(err)
	}
	if el.XMLName.Local != "text" || el.Body != Text {
		t.Errorf("SVGNote = <%s>%s", el.XMLName.Local, el.Body)
	}
	if !strings.Contains(SVGNote(10, 20.5), `y="20.5"`) {
		t.Errorf("SVGNote position: %s", SVGNote(10, 20.5))
	}
}
