package alarms_test

import (
	"encoding/csv"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/profiles"
)

// loadReference reads the 1 Hz reference oximeter trend of one subject of
// the camera-oximetry open dataset (Hoffman et al., npj Digit. Med. 5, 146
// (2022), MIT): t_s,spo2_ref_pct,pulse_ref_bpm,... with empty cells missing.
func loadReference(t *testing.T, subject string) []alarms.Sample {
	t.Helper()
	// The dataset is committed with the repository (testdata/camera-oximetry,
	// MIT): missing is a broken checkout, never a reason to skip.
	f, err := os.Open(filepath.Join("..", "testdata", "camera-oximetry", subject, "reference.csv"))
	if err != nil {
		t.Fatalf("the committed open dataset is missing: %v", err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	num := func(s string) float64 {
		v, err := strconv.ParseFloat(s, 64)
		if err != nil {
			return math.NaN()
		}
		return v
	}
	var out []alarms.Sample
	for _, r := range rows[1:] {
		out = append(out, alarms.Sample{T: num(r[0]), SpO2: num(r[1]), Pulse: num(r[2]), PI: math.NaN(), SQI: math.NaN()})
	}
	return out
}

// oracleSpO2Low is the contract's threshold rule written as plainly as
// possible (no engine code): presence from the first reading < limit to the
// first reading >= limit + hysteresis, announced at the first sample with
// t - onset >= delay; missing readings change nothing. It returns
// "onset/announced/ended" for each announced episode.
func oracleSpO2Low(samples []alarms.Sample, limit, hyst, delay float64) []string {
	var out []string
	present, announced := false, false
	var onset, ann float64
	for _, s := range samples {
		valid := s.SpO2 > 0 && s.SpO2 <= 100
		if !present {
			if valid && s.SpO2 < limit {
				present, announced, onset = true, false, s.T
			} else {
				continue
			}
		} else if valid && s.SpO2 >= limit+hyst {
			if announced {
				out = append(out, fmt.Sprintf("%g/%g/%g", onset, ann, s.T))
			}
			present = false
			continue
		}
		if !announced && s.T-onset >= delay {
			announced, ann = true, s.T
		}
	}
	if present && announced {
		out = append(out, fmt.Sprintf("%g/%g/", onset, ann))
	}
	return out
}

// Real induced-hypoxemia recordings (the dataset README: saturation fell
// from about 100 % towards 65-70 % over 13-19 minutes), replayed through the
// built-in adult-ward-pilot profile: the spo2_low episodes are exactly those
// of the plainly written contract rule, the deepest episode holds the lowest
// reading of the record, and it escalated to high priority (immediate
// response) because the reading went below 85 %.
func TestOpenDatasetHypoxemiaRaisesTheWardAlarm(t *testing.T) {
	p, err := profiles.Get("adult-ward-pilot")
	if err != nil {
		t.Fatal(err)
	}
	c := p.Condition("spo2_low")
	for _, subject := range []string{"subject-1", "subject-2", "subject-3", "subject-4"} {
		t.Run(subject, func(t *testing.T) {
			samples := loadReference(t, subject)
			var lows []alarms.Episode
			var got []string
			if err := alarms.Replay(p, subject, samples, func(ep alarms.Episode) {
				if ep.Kind == alarms.SpO2Low {
					lows = append(lows, ep)
					end := ""
					if !math.IsNaN(ep.EndedS) {
						end = fmt.Sprint(ep.EndedS)
					}
					got = append(got, fmt.Sprintf("%g/%g/%s", ep.OnsetS, ep.AnnouncedS, end))
				}
			}); err != nil {
				t.Fatal(err)
			}
			want := oracleSpO2Low(samples, c.Limit, c.Hysteresis, c.Delay.Seconds())
			if fmt.Sprint(got) != fmt.Sprint(want) || len(want) == 0 {
				t.Fatalf("spo2_low episodes (onset/announced/ended) %v, want %v (and at least one)", got, want)
			}
			lowest := math.Inf(1)
			for _, s := range samples {
				if s.SpO2 > 0 && s.SpO2 < lowest {
					lowest = s.SpO2
				}
			}
			deepest := lows[0]
			for _, ep := range lows {
				if ep.MinSpO2 < deepest.MinSpO2 {
					deepest = ep
				}
			}
			if deepest.MinSpO2 != lowest || lowest >= 85 || deepest.Priority != alarms.PriorityHigh || deepest.DeficitPctS <= 0 {
				t.Errorf("deepest episode %+v; want min = lowest reading %g (< 85) and high priority", deepest, lowest)
			}
			ix, err := alarms.DesatIndices(samples, alarms.IndexOptions{DropPct: 3})
			if err != nil {
				t.Fatal(err)
			}
			if ix.Events == 0 || !(ix.T90Pct > 0) {
				t.Errorf("indices %+v: a descent below 85 %% must count desaturations and time below 90 %%", ix)
			}
			t.Logf("%s: spo2_low %v, lowest %g; ODI3 %.1f /h, T90 %.1f %%", subject, got, lowest, ix.ODIPerHour, ix.T90Pct)
		})
	}
}
