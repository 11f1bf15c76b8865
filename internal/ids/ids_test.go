package ids

import (
	"strings"
	"testing"
)

// The rule is the API's (ingest.proto: device ids are 1..64 of
// A-Z a-z 0-9 . _ -); errors name the field and the bound.
func TestCheck(t *testing.T) {
	for _, ok := range []string{"a", "ward-3.bed_12", strings.Repeat("x", MaxLen)} {
		if err := Check("device", ok); err != nil {
			t.Errorf("Check(%q) = %v, want nil", ok, err)
		}
	}
	for in, want := range map[string]string{
		"":                            "device: length 0, want 1..64",
		strings.Repeat("x", MaxLen+1): "device: length 65, want 1..64",
		"bed 12":                      `has character ' '`,
		"b\u00e9d":                    "want only A-Z a-z 0-9 . _ -",
		"../etc":                      `has character '/'`,
	} {
		err := Check("device", in)
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("Check(%q) = %v, want an error containing %q", in, err, want)
		}
	}
}
