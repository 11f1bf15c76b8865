package pairing

import (
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/caution"
)

// The raw and reference readers skip the '#' caution line pulsefleet writes
// atop its CSV files (docs/contracts.md, "The caution on every output").
func TestReadersSkipTheCautionLine(t *testing.T) {
	raw, err := ReadRaw(strings.NewReader(caution.Comment+"red,ir\n1,2\n3,4\n"), "", "")
	if err != nil || len(raw.Red) != 2 || raw.IR[1] != 4 {
		t.Errorf("ReadRaw after the caution: %+v, %v", raw, err)
	}
	ref, err := ReadReference(strings.NewReader(caution.Comment+"t_s,spo2_ref_pct\n0,97\n1,96\n"), "")
	if err != nil || len(ref) != 2 {
		t.Errorf("ReadReference after the caution: %+v, %v", ref, err)
	}
}
