// Package progress shows how far a long command (export, tune, estimate)
// has come on its standard error: on a terminal, one status line rewritten
// in place at most so often and ended by a final line; elsewhere (a pipe, a
// log file) nothing, unless the command prints plain milestone lines.
package progress
