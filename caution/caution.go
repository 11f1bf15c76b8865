package caution

import (
	"html"
	"io"
	"strconv"
)

// Text is the caution, one sentence pair, plain ASCII, no line breaks.
const Text = "pulsefleet is a research and engineering tool, NOT a certified medical alarm or medical device. " +
	"Do not rely on it for patient care; follow local regulations, your ethics approval and licensed clinical practice."

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

// SVGNote is Text as an SVG text element at (x, y) in user units, small
// and grey, so a chart saved on its own still carries it.
func SVGNote(x, y float64) string {
	return `<text class="caution" x="` + ftoa(x) + `" y="` + ftoa(y) +
		`" font-family="sans-serif" font-size="10" fill="#555">` + html.EscapeString(Text) + `</text>`
}

func ftoa(f float64) string { return strconv.FormatFloat(f, 'f', -1, 64) }
