package caution

import (
	"html"
	"io"
	"strconv"
	"strings"
)

// Text is the caution: two sentences, plain ASCII, no line breaks.
// It has no comma, so a CSV tool that does not skip '#' lines still sees
// the comment line as one cell.
const Text = "pulsefleet is a research and engineering tool and NOT a certified medical alarm or medical device. " +
	"Do not rely on it for patient care; work within local regulations and your ethics approval and under licensed clinical practice."

// Line is Text as printed on a terminal (serve and demo start-up).
const Line = "CAUTION: " + Text

// Comment is Text as one comment line, newline included, for the top of CSV
// and YAML files. Every pulsefleet reader of those files skips lines that
// start with '#'.
const Comment = "# " + Line + "\n"

// JSONKey is the name of the field that carries Text in JSON output.
const JSONKey = "caution"

// WriteComment writes Comment to w.
func WriteComment(w io.Writer) error {
	_, err := io.WriteString(w, Comment)
	return err
}

// HTML is Text escaped for HTML text and attribute values.
func HTML() string { return html.EscapeString(Text) }

// SVGNoteHeight is the height in user units that SVGNote needs below its y.
const SVGNoteHeight = 26

// SVGNote is Text as an SVG text element of two lines (one per sentence,
// each under 700 units wide at its 10-unit font) starting at baseline (x, y),
// small and grey, so a chart saved on its own still carries it. Give the
// drawing SVGNoteHeight more units of height for it.
func SVGNote(x, y float64) string {
	first, second, _ := strings.Cut(Text, ". ")
	xs := ftoa(x)
	return `<text class="caution" x="` + xs + `" y="` + ftoa(y) + `" font-family="sans-serif" font-size="10" fill="#555">` +
		`<tspan x="` + xs + `">` + html.EscapeString(first) + `.</tspan>` +
		`<tspan x="` + xs + `" dy="12">` + html.EscapeString(second) + `</tspan></text>`
}

func ftoa(f float64) string { return strconv.FormatFloat(f, 'f', -1, 64) }
