package review

import (
	"fmt"
	"strings"
	"unicode/utf8"
)

// The labels, in the order the CLI and the page offer them.
const (
	Actionable    = "actionable"
	NotActionable = "not-actionable"
	Artefact      = "artefact"
	Unsure        = "unsure"
)

// Labels lists every label.
var Labels = []string{Actionable, NotActionable, Artefact, Unsure}

// Meaning says what each label means (the page shows it as a hint).
var Meaning = map[string]string{
	Actionable:    "a real event that needed someone to act (or would have, had nobody been there)",
	NotActionable: "a real reading, but nothing needed to be done (brief, expected or already handled)",
	Artefact:      "the reading was wrong: motion, a loose or misplaced sensor, poor signal",
	Unsure:        "the reviewer cannot tell; counts as neither positive nor negative",
}

// MaxNote is the longest note, in characters.
const MaxNote = 500

// CheckLabel refuses a label that is not one of Labels, naming the field.
func CheckLabel(field, label string) error {
	for _, l := range Labels {
		if label == l {
			return nil
		}
	}
	return fmt.Errorf("%s: %q, want one of %s", field, label, strings.Join(Labels, ", "))
}

// CheckNote refuses a note longer than MaxNote characters or not UTF-8.
func CheckNote(field, note string) error {
	if !utf8.ValidString(note) {
		return fmt.Errorf("%s: not valid UTF-8", field)
	}
	if n := utf8.RuneCountInString(note); n > MaxNote {
		return fmt.Errorf("%s: %d characters, want at most %d", field, n, MaxNote)
	}
	return nil
}
