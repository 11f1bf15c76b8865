package main

import (
	"bytes"
	"context"
	"errors"
	"strings"
	"testing"
	"time"
	"unicode/utf8"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// hostile holds text a device, an operator or a request can put into a
// table: line breaks that would forge a row, a tab that would shift columns,
// and ECMA-48 control sequences (C0 ESC with OSC / CSI, the 8-bit C1 CSI,
// DEL) that set a window title, clear the screen or recolour the terminal;
// the code points are ECMA-48's (from memory), the bidi override is
// Unicode's U+202E (from memory).
var hostile = []string{
	"ward\nFORGED  connected  raw",
	"bed\r7",
	"\x1b]0;owned\x07title",
	"\x1b[2Jclear",
	"c1\u009b31mred",
	"raw\x9bbyte",
	"del\x7f",
	"tab\tcolumn",
	"nul\x00",
	"rtl\u202eevil",
}

// checkTerminalSafe fails when out carries a control character other than
// the line feeds ending its rows, a C1 control, a bidi override or bytes
// that are not UTF-8, or has other than rows lines.
func checkTerminalSafe(t *testing.T, what, out string, rows int) {
	t.Helper()
	if !utf8.ValidString(out) {
		t.Errorf("%s: output is not UTF-8: %q", what, out)
	}
	for _, r := range out {
		if (r < 0x20 && r != '\n') || r == 0x7f || (r >= 0x80 && r <= 0x9f) || (r >= 0x202a && r <= 0x202e) || (r >= 0x2066 && r <= 0x2069) {
			t.Errorf("%s: output carries control character %U:\n%q", what, r, out)
			break
		}
	}
	if n := strings.Count(out, "\n"); n != rows {
		t.Errorf("%s: %d lines, want %d (header + rows): a line break in a cell forged a row:\n%s", what, n, rows, out)
	}
}

func TestTablesEscapeControlCharacters(t *testing.T) {
	now := time.Date(2026, 12, 1, 12, 0, 0, 0, time.UTC)
	var audits []*pb.AuditEntry
	var devs []*pb.Device
	var toks []*pb.Token
	var quals []*pb.DeviceQuality
	cals := &pb.ListCalibrationsResponse{}
	for i, h := range hostile {
		audits = append(audits, &pb.AuditEntry{TimeUnixMs: now.UnixMilli(), Actor: h, Action: "auth.failure", DeviceId: h, Remote: h,
			Detail: "web GET /" + h + ": unknown credential"})
		devs = append(devs, &pb.Device{DeviceId: h, Labels: map[string]string{"bed": h, h: "x"}, ActiveConditions: []string{h},
			LastSeenUnixMs: now.UnixMilli()})
		toks = append(toks, &pb.Token{TokenId: h, Kind: "operator", Subject: h, IssuedBy: h, CreatedUnixMs: now.UnixMilli()})
		quals = append(quals, &pb.DeviceQuality{DeviceId: h, Sessions: uint64(i)})
		cals.Calibrations = append(cals.Calibrations, &pb.Calibration{Name: h, Version: 1, CreatedBy: h})
		cals.Assignments = append(cals.Assignments, &pb.CalibrationAssignment{Target: h, Calibration: h + "@v1"})
	}
	n := len(hostile)
	for _, tc := range []struct {
		name  string
		write func(*bytes.Buffer) error
		lines int
	}{
		{"audit", func(b *bytes.Buffer) error { return writeAuditTable(b, audits) }, n + 1},
		{"devices", func(b *bytes.Buffer) error { return writeDevicesTable(b, devs, nil, now, 10*time.Second) }, n + 1},
		{"token list", func(b *bytes.Buffer) error { return writeTokensTable(b, toks) }, n + 1},
		{"quality", func(b *bytes.Buffer) error { return writeQualityTable(b, quals) }, n + 1},
		{"calibrations", func(b *bytes.Buffer) error { return writeCalibrationsTable(b, cals) }, 2*(n+1) + 1},
	} {
		var b bytes.Buffer
		if err := tc.write(&b); err != nil {
			t.Fatalf("%s: %v", tc.name, err)
		}
		checkTerminalSafe(t, tc.name, b.String(), tc.lines)
		// The text is still there, readable, as Go escapes.
		for _, want := range []string{`ward\nFORGED`, `bed\r7`, `\x1b]0;owned\x07title`, `c1\u009b31mred`, `raw\x9bbyte`, `tab\tcolumn`, `rtl\u202eevil`} {
			if !strings.Contains(b.String(), want) {
				t.Errorf("%s: output lacks the escaped form %s:\n%s", tc.name, want, b.String())
			}
		}
	}
}

func TestSafeCell(t *testing.T) {
	for in, want := range map[string]string{
		"bed-7 ward=3":    "bed-7 ward=3",    // printable text passes as is
		"Zoë 12 °C":       "Zoë 12 °C",       // and so does printable Unicode
		"a\nb":            `a\nb`,            // LF
		"a\\nb":           `a\\nb`,           // a typed backslash cannot pass for an escape
		"\x1b[31m":        `\x1b[31m`,        // CSI
		"\u0085":          `\u0085`,          // C1 NEL
		"\xff":            `\xff`,            // not UTF-8
		"\u2066x\u2069":   `\u2066x\u2069`,   // bidi isolates
		"\uFFFD replaced": "\uFFFD replaced", // a real replacement character is printable
	} {
		if got := safeCell(in); got != want {
			t.Errorf("safeCell(%q) = %q, want %q", in, got, want)
		}
	}
}

// A failing command's one-line error can carry text from a gateway or a
// file: its control characters are escaped too, so it stays one line.
func TestErrorLineEscapesControlCharacters(t *testing.T) {
	register(command{name: "test-hostile-error", run: func(context.Context, []string, stdio) error {
		return errors.New("gateway said: bed\n7\x1b]0;owned\x07 C:\\data")
	}})
	defer delete(commands, "test-hostile-error")
	var out, errb bytes.Buffer
	if code := run(context.Background(), []string{"test-hostile-error"}, stdio{out: &out, err: &errb}); code != 1 {
		t.Fatalf("exit %d, want 1", code)
	}
	checkTerminalSafe(t, "error line", errb.String(), 1)
	if want := `gateway said: bed\n7\x1b]0;owned\x07 C:\data`; !strings.Contains(errb.String(), want) {
		t.Errorf("error line %q lacks %q", errb.String(), want)
	}
}
