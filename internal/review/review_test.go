package review

import (
	"strings"
	"testing"
)

func TestLabelsAndNotesAreChecked(t *testing.T) {
	for _, l := range Labels {
		if err := CheckLabel("label", l); err != nil {
			t.Errorf("%s refused: %v", l, err)
		}
		if Meaning[l] == "" {
			t.Errorf("%s has no meaning", l)
		}
	}
	for _, bad := range []string{"", "Actionable", "false-alarm", "artifact"} {
		err := CheckLabel("label", bad)
		if err == nil || !strings.Contains(err.Error(), "label: ") || !strings.Contains(err.Error(), "not-actionable") {
			t.Errorf("CheckLabel(%q) = %v, want an error naming the field and the labels", bad, err)
		}
	}
	if err := CheckNote("note", strings.Repeat("é", MaxNote)); err != nil {
		t.Errorf("a note of %d characters refused: %v", MaxNote, err)
	}
	if err := CheckNote("note", strings.Repeat("a", MaxNote+1)); err == nil || !strings.Contains(err.Error(), "at most 500") {
		t.Errorf("a note of %d characters: %v, want refused with the bound", MaxNote+1, err)
	}
	if err := CheckNote("note", "\xff"); err == nil {
		t.Error("a note that is not UTF-8 accepted")
	}
}
