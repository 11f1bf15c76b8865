package main

import (
	"flag"
	"regexp"
	"strings"
	"time"
)

// rpcPrefix matches the transport prefix grpc-go puts before a status
// message ("rpc error: code = NotFound desc = ").
var rpcPrefix = regexp.MustCompile(`rpc error: code = ([A-Za-z]+) desc = `)

// dialError matches grpc-go's text for a gateway that could not be reached.
var dialError = regexp.MustCompile(`connection error: desc = "transport: (?:Error while dialing: )?([^"]*)"`)

// errorText is the one sentence a command prints for a failure: the gRPC
// transport prefix is dropped and only the status code's name kept
// ("NotFound: device_id: ..."; the gateway's own message names the field and
// the reason), and a word repeated across a ": " join by two layers of
// wrapping ("calibration: calibration \"x\" not found") is said once. Every
// command's error goes through it (see run in main.go).
func errorText(err error) string {
	s := rpcPrefix.ReplaceAllString(err.Error(), "$1: ")
	s = dialError.ReplaceAllString(s, "cannot connect: $1")
	parts := strings.Split(s, ": ")
	out := parts[:0]
	for i, p := range parts {
		if i+1 < len(parts) {
			next := parts[i+1]
			w := strings.TrimSpace(p)
			if w != "" && !strings.ContainsAny(w, " \t") &&
				(next == w || strings.HasPrefix(next, w+" ")) {
				continue // "calibration: calibration x" -> "calibration x"
			}
		}
		out = append(out, p)
	}
	return strings.Join(out, ": ")
}

// flagFormat says what a flag of each kind wants, for a parse error.
func flagFormat(v flag.Value) string {
	g, ok := v.(flag.Getter)
	if !ok {
		return ""
	}
	switch g.Get().(type) {
	case time.Duration:
		return "a duration such as 90s, 5m or 1h30m"
	case bool:
		return "true or false"
	case int, int64:
		return "a whole number"
	case uint, uint64:
		return "a whole number, 0 or more"
	case float64:
		return "a number such as 2.5"
	}
	return ""
}

// flagParseError matches the flag package's message for a bad value.
var flagParseError = regexp.MustCompile(`^invalid value "(.*)" for flag -([^:]+): (.*)$`)

// flagError rewrites the flag package's error for a bad value ("invalid
// value "abc" for flag -duration: parse error") to one that names the flag
// and the expected format.
func flagError(fs *flag.FlagSet, err error) error {
	m := flagParseError.FindStringSubmatch(err.Error())
	if m == nil {
		return usageError{err.Error()}
	}
	fl := fs.Lookup(m[2])
	if fl == nil {
		return usageError{err.Error()}
	}
	if want := flagFormat(fl.Value); want != "" {
		return usagef("--%s %q: want %s", m[2], m[1], want)
	}
	return usagef("--%s %q: %s", m[2], m[1], m[3])
}
