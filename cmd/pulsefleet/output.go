package main

import (
	"encoding/json"
	"fmt"
	"io"
	"strings"
	"text/tabwriter"
	"unicode/utf8"

	"google.golang.org/protobuf/encoding/protojson"
	"google.golang.org/protobuf/proto"
)

// writeProtoJSON writes messages as one indented JSON array, each in its
// protojson form (opts, when given, chooses field names and defaults).
func writeProtoJSON[M proto.Message](w io.Writer, ms []M, opts ...protojson.MarshalOptions) error {
	var mo protojson.MarshalOptions
	if len(opts) > 0 {
		mo = opts[0]
	}
	arr := make([]json.RawMessage, 0, len(ms))
	for _, m := range ms {
		b, err := mo.Marshal(m)
		if err != nil {
			return err
		}
		arr = append(arr, b)
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(arr)
}

// safeCell makes one table cell safe to print on a terminal. Text in a table
// comes from devices, operators and requests (labels, ids, audit details,
// request paths); a control character in it could forge rows (CR, LF),
// shift columns (TAB) or drive the terminal (ESC and CSI/OSC sequences:
// titles, hyperlinks, colours, cursor moves). Every C0 control, DEL, every
// C1 control (U+0080..U+009F), the bidirectional overrides and isolates
// (U+202A..U+202E, U+2066..U+2069, which reorder what is shown) and bytes
// that are not UTF-8 are shown as Go escapes instead (\n, \r, \t, \x1b,
// \u009b, \u202e); a backslash is doubled so an escape in the input cannot
// pass for one made here.
func safeCell(s string) string { return escapeControls(s, true) }

// safeText is safeCell for a line of prose (an error message): control
// characters are escaped, a backslash is left as it is.
func safeText(s string) string { return escapeControls(s, false) }

func escapeControls(s string, backslash bool) string {
	clean := true
	for _, r := range s {
		if (backslash && r == '\\') || r == utf8.RuneError || needsEscape(r) {
			clean = false
			break
		}
	}
	if clean {
		return s
	}
	var b strings.Builder
	for i := 0; i < len(s); {
		r, n := utf8.DecodeRuneInString(s[i:])
		switch {
		case r == utf8.RuneError && n <= 1:
			fmt.Fprintf(&b, `\x%02x`, s[i])
		case r == '\\' && backslash:
			b.WriteString(`\\`)
		case r == '\n':
			b.WriteString(`\n`)
		case r == '\r':
			b.WriteString(`\r`)
		case r == '\t':
			b.WriteString(`\t`)
		case r < 0x80 && needsEscape(r):
			fmt.Fprintf(&b, `\x%02x`, r)
		case needsEscape(r):
			fmt.Fprintf(&b, `\u%04x`, r)
		default:
			b.WriteString(s[i : i+n])
		}
		i += n
	}
	return b.String()
}

func needsEscape(r rune) bool {
	return r < 0x20 || r == 0x7f || (r >= 0x80 && r <= 0x9f) ||
		(r >= 0x202a && r <= 0x202e) || (r >= 0x2066 && r <= 0x2069)
}

// table prints aligned columns (text/tabwriter) with every cell passed
// through safeCell, so no table of the CLI prints device- or operator-supplied
// text raw. Every table of the CLI is written through it.
type table struct{ tw *tabwriter.Writer }

// newTable starts a table on w with columns padded by two spaces; flags are
// tabwriter's (AlignRight for numeric tables). The header is written as a row.
func newTable(w io.Writer, flags uint, header ...string) *table {
	t := &table{tw: tabwriter.NewWriter(w, 0, 4, 2, ' ', flags)}
	if len(header) > 0 {
		t.row(header...)
	}
	return t
}

// row writes one row; each cell goes through safeCell.
func (t *table) row(cells ...string) {
	for i, c := range cells {
		if i > 0 {
			io.WriteString(t.tw, "\t")
		}
		io.WriteString(t.tw, safeCell(c))
	}
	io.WriteString(t.tw, "\n")
}

// rowTerminated writes one row with a tab after the last cell too (needed
// for tabwriter.AlignRight, which aligns only tab-terminated cells).
func (t *table) rowTerminated(cells ...string) {
	for _, c := range cells {
		io.WriteString(t.tw, safeCell(c))
		io.WriteString(t.tw, "\t")
	}
	io.WriteString(t.tw, "\n")
}

func (t *table) flush() error { return t.tw.Flush() }
