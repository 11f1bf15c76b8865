// Package relay turns the text a prototype prints, one sample per line, into
// the data messages of the pulsefleet ingest protocol: it parses lines
// ([Parser]), stamps samples with device time and groups them into raw
// chunks or summaries ([Assembler]), and reads lines from a file, standard
// input, a serial port, a TCP connection or a listening socket, reopening
// live sources that go away ([Sources]). Delivery (sequence numbers,
// acknowledgements, resume, spool) is package uplink's; the `relay` command
// joins the two.
//
// Line format: fields separated by commas (or semicolons, tabs or spaces).
// An optional first line of column names (a header) says which field is
// which; without one the configured columns apply (raw: red,ir; summary:
// spo2,pulse,pi). Known names: red, ir, ambient, t_s, t_ms (raw) and spo2,
// pulse, pi, sqi, t_s, t_ms (summary); unknown header names are ignored.
// Empty lines and lines starting with # (debug prints, comments) are skipped.
// A bad line is rejected with one reason (Reason*) and never stops the
// stream.
//
// Time: with a t_s or t_ms column, a sample's device time follows it (an
// absolute Unix time is kept as it is; a time relative to the device's
// start is placed on the anchor); without one, sample k is anchor + k /
// rate. The caller chooses the anchor: the arrival of the first line for a
// live source, or so that a recording ends now when a file is sent faster
// than real time (device time never runs ahead of the gateway's clock).
package relay
