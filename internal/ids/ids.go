// Package ids checks the identifiers the API accepts for devices, operators
// and labels: 1..MaxLen characters of A-Z a-z 0-9 . _ -, so they are safe in
// store keys, metric labels, file names and log lines without quoting. The
// ingest pipeline and the credential code both check with it, so a device
// id accepted on a stream is one a credential can be issued for.
package ids

import "fmt"

// MaxLen bounds an identifier. It is part of the API (see ingest.proto).
const MaxLen = 64

// Check returns an error naming field and the bound when id is not 1..MaxLen
// characters of A-Z a-z 0-9 . _ -.
func Check(field, id string) error {
	if n := len(id); n < 1 || n > MaxLen {
		return fmt.Errorf("%s: length %d, want 1..%d", field, n, MaxLen)
	}
	for i := 0; i < len(id); i++ {
		c := id[i]
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '.' || c == '_' || c == '-') {
			return fmt.Errorf("%s: %q has character %q, want only A-Z a-z 0-9 . _ -", field, id, c)
		}
	}
	return nil
}
