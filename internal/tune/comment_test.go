package tune

import (
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/caution"
)

// tune's inputs may be files pulsefleet wrote, which start with the caution
// line (docs/contracts.md, "The caution on every output"): the events
// reader and the trend reader skip it, and a trend tune writes reads back.
func TestReadersSkipTheCautionLine(t *testing.T) {
	evs, err := ReadEventsCSV(strings.NewReader(caution.Comment + EventColumns + "\nbed-1,10,70,desat\n"))
	if err != nil || len(evs) != 1 || evs[0].Device != "bed-1" || evs[0].End != 70 {
		t.Errorf("events after the caution: %+v, %v", evs, err)
	}
	var b strings.Builder
	in := []alarms.Trend{{Device: "bed-1", Samples: []alarms.Sample{{T: 1, SpO2: 97, Pulse: 60, PI: 1, SQI: 0.9}}}}
	if err := WriteTrendCSV(&b, in); err != nil {
		t.Fatal(err)
	}
	if !strings.HasPrefix(b.String(), caution.Comment) {
		t.Errorf("trend file does not start with the caution line:\n%s", b.String())
	}
	back, err := alarms.ReadTrendCSV(strings.NewReader(b.String()))
	if err != nil || len(back) != 1 || back[0].Samples[0].SpO2 != 97 {
		t.Errorf("trend read back as %+v, %v", back, err)
	}
}
