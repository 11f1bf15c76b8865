// Command pulsefleet is the one binary of the pulsefleet gateway: it serves
// devices and operators, simulates fleets, estimates SpO2 from recordings,
// replays and tunes alarm profiles, calibrates prototypes and exports history.
//
// main is thin: each subcommand lives in its own file (cmd_NAME.go), parses
// its own flags into an options struct, and writes to injected writers so it
// can be tested without a process.
package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"sort"
	"strings"
	"syscall"
	_ "time/tzdata" // --tz of replay --participant works on hosts without a zone database
)

// command is one subcommand of the binary.
type command struct {
	name    string // as typed on the command line
	summary string // one line for the top-level help
	// run executes the command. args excludes the command name. It returns
	// a usageError for bad flags or arguments (exit code 2), an
	// incompleteError for a merged history answer that lacks a gateway
	// (exit code 3, exitIncomplete) and any other error for a failure (exit
	// code 1).
	run func(ctx context.Context, args []string, io stdio) error
}

// stdio is what a command may read from and write to.
type stdio struct {
	in  io.Reader
	out io.Writer
	err io.Writer
}

var commands = map[string]command{}

// register adds a subcommand; each cmd_*.go file calls it from init.
func register(c command) {
	if _, dup := commands[c.name]; dup {
		panic("pulsefleet: command registered twice: " + c.name)
	}
	commands[c.name] = c
}

// usageError marks an error in how the command was called (exit status 2).
type usageError struct{ msg string }

func (e usageError) Error() string { return e.msg }

func usagef(format string, args ...any) error { return usageError{fmt.Sprintf(format, args...)} }

// newFlagSet returns a flag set that reports errors instead of exiting and
// prints its usage, with the command's summary, to w.
func newFlagSet(name, synopsis string, w io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(w)
	fs.Usage = func() {
		w := fs.Output()
		fmt.Fprintf(w, "usage: pulsefleet %s %s\n", name, synopsis)
		if c, ok := commands[name]; ok && c.summary != "" {
			fmt.Fprintf(w, "\n%s\n", c.summary)
		}
		fmt.Fprintln(w, "\nflags:")
		fs.PrintDefaults()
	}
	return fs
}

// parseFlags parses args and maps flag errors to usage errors; -h/--help
// yields errHelp, which exits 0.
// On a bad flag only the one-sentence error is printed (by run), not the
// flag package's own message and the whole usage.
func parseFlags(fs *flag.FlagSet, args []string) error {
	real := fs.Output()
	var held bytes.Buffer
	fs.SetOutput(&held)
	err := fs.Parse(args)
	fs.SetOutput(real)
	if err != nil {
		if errors.Is(err, flag.ErrHelp) {
			real.Write(held.Bytes())
			return errHelp
		}
		return flagError(fs, err)
	}
	if fs.NArg() > 0 {
		return usagef("%s: unexpected argument %q", fs.Name(), fs.Arg(0))
	}
	return nil
}

var errHelp = errors.New("help requested")

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	os.Exit(run(ctx, os.Args[1:], stdio{in: os.Stdin, out: os.Stdout, err: os.Stderr}))
}

// run dispatches to a subcommand and returns the process exit status.
func run(ctx context.Context, args []string, s stdio) int {
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" || args[0] == "help" {
		if len(args) > 1 {
			return run(ctx, []string{args[1], "--help"}, s)
		}
		printHelp(s.out)
		return 0
	}
	c, ok := commands[args[0]]
	if !ok {
		fmt.Fprintf(s.err, "pulsefleet: unknown command %q\n\n", args[0])
		printHelp(s.err)
		return 2
	}
	err := c.run(ctx, args[1:], s)
	var ue usageError
	var ie incompleteError
	switch {
	case err == nil, errors.Is(err, errHelp):
		return 0
	case errors.As(err, &ie):
		// A merged history answer without an unreachable gateway's part.
		fmt.Fprintf(s.err, "pulsefleet %s: %s\n", c.name, safeText(errorText(err)))
		return exitIncomplete
	case errors.As(err, &ue):
		fmt.Fprintf(s.err, "pulsefleet %s: %s\n(run 'pulsefleet %s --help' for usage)\n", c.name, safeText(errorText(err)), c.name)
		return 2
	default:
		// Errors can carry a gateway's or a file's text: escape controls.
		fmt.Fprintf(s.err, "pulsefleet %s: %s\n", c.name, safeText(errorText(err)))
		return 1
	}
}

func printHelp(w io.Writer) {
	fmt.Fprintln(w, "pulsefleet: a gateway for pilot fleets of prototype pulse oximeters.")
	fmt.Fprintln(w, "Research and engineering tool, NOT a certified medical alarm.")
	fmt.Fprintln(w, "\nusage: pulsefleet COMMAND [flags]\n\ncommands:")
	names := make([]string, 0, len(commands))
	for n := range commands {
		names = append(names, n)
	}
	sort.Strings(names)
	width := 0
	for _, n := range names {
		width = max(width, len(n))
	}
	for _, n := range names {
		fmt.Fprintf(w, "  %-*s  %s\n", width, n, firstLine(commands[n].summary))
	}
	fmt.Fprintln(w, "\nRun 'pulsefleet COMMAND --help' for a command's flags.")
}

// firstLine returns a summary's first sentence, joined across the line
// breaks of its first paragraph.
func firstLine(s string) string {
	if i := strings.Index(s, "\n\n"); i >= 0 {
		s = s[:i]
	}
	s = strings.Join(strings.Fields(s), " ")
	if i := strings.Index(s, ". "); i >= 0 {
		s = s[:i+1]
	}
	// Keep the list to one line a command: shorten a long sentence at its
	// first colon, else at its first comma past the opening words.
	if len(s) > 100 {
		if i := strings.Index(s, ": "); i > 0 {
			s = s[:i] + "."
		} else if i := strings.Index(s[40:], ", "); i >= 0 {
			s = s[:40+i] + "."
		}
	}
	return s
}
