package tune

import (
	"fmt"
	"sort"

	"github.com/pulsefleet/pulsefleet/alarms"
	"go.yaml.in/yaml/v3"

	"github.com/pulsefleet/pulsefleet/internal/participants"
)

// decodeParticipants reads the grid's `participants: [P-0001, ...]`: the
// sweep then runs only over those participants' history (each device's
// samples inside their enrolments) and reports alarms per participant-day
// beside per device-day.
func (g *Grid) decodeParticipants(v *yaml.Node, path string) error {
	if v.Kind != yaml.SequenceNode || len(v.Content) == 0 {
		return fmt.Errorf("%s (line %d): want a list of participant ids such as [P-0001, P-0002]", path, v.Line)
	}
	seen := map[string]bool{}
	for _, n := range v.Content {
		if n.Kind != yaml.ScalarNode {
			return fmt.Errorf("%s (line %d): want a participant id", path, n.Line)
		}
		if err := participants.CheckID(fmt.Sprintf("%s (line %d)", path, n.Line), n.Value); err != nil {
			return err
		}
		if seen[n.Value] {
			return fmt.Errorf("%s (line %d): %s is listed twice", path, n.Line, n.Value)
		}
		seen[n.Value] = true
		g.Participants = append(g.Participants, n.Value)
	}
	return nil
}

// ByParticipant cuts trends to the history of the listed participants:
// for each participant (in list order) and each enrolled device with
// samples, one trend of the device's samples inside that participant's
// enrolments. It returns the trends and, in parallel, their participants
// (Options.TrendParticipants). A listed participant without samples is an
// error; so is a device that served two listed participants when the
// reference is an events file (its events, keyed by device, would be
// ambiguous).
func ByParticipant(trends []alarms.Trend, ivs []participants.Interval, pids []string, ref Reference) ([]alarms.Trend, []string, error) {
	byDev := map[string]alarms.Trend{}
	for _, tr := range trends {
		byDev[tr.Device] = tr
	}
	var out []alarms.Trend
	var of []string
	served := map[string]string{}
	for _, pid := range pids {
		segs := participants.Stitch(ivs, pid, -1<<62, 1<<62)
		cut := map[string][]alarms.Sample{}
		var order []string
		for _, sg := range segs {
			tr, ok := byDev[sg.Device]
			if !ok {
				continue
			}
			s := tr.Samples
			lo := sort.Search(len(s), func(i int) bool { return s[i].T*1000 >= float64(sg.FromMS) })
			hi := sort.Search(len(s), func(i int) bool { return s[i].T*1000 >= float64(sg.ToMS) })
			if hi > lo {
				if _, ok := cut[sg.Device]; !ok {
					order = append(order, sg.Device)
				}
				cut[sg.Device] = append(cut[sg.Device], s[lo:hi]...)
			}
		}
		if len(order) == 0 {
			return nil, nil, fmt.Errorf("participants: %s has no trend samples inside their enrolments", pid)
		}
		for _, dev := range order {
			if other, dup := served[dev]; dup && ref.Rule == nil && ref.Reviews == nil {
				return nil, nil, fmt.Errorf("participants: device %s served both %s and %s; an events file names devices, not participants, so tune them in separate grids or use a reference rule", dev, other, pid)
			}
			served[dev] = pid
			out = append(out, alarms.Trend{Device: dev, Samples: cut[dev]})
			of = append(of, pid)
		}
	}
	return out, of, nil
}

// participantFacts sets res.Participants and res.ParticipantS: per
// participant the union of the monitored segments of their trends (two
// devices worn at once count once), summed.
func participantFacts(devs []devInfo, of []string, res *Result) {
	segs := map[string][][2]float64{}
	for d, pid := range of {
		segs[pid] = append(segs[pid], devs[d].segs...)
	}
	res.Participants = len(segs)
	for _, ss := range segs {
		res.ParticipantS += unionLength(ss)
	}
}

// unionLength is the total length covered by intervals.
func unionLength(ivs [][2]float64) float64 {
	sort.Slice(ivs, func(i, j int) bool { return ivs[i][0] < ivs[j][0] })
	total, end := 0.0, -1e300
	for _, iv := range ivs {
		if iv[1] <= end {
			continue
		}
		total += iv[1] - max(iv[0], end)
		end = iv[1]
	}
	return total
}

// LoadEnrolments reads every enrolment of the store in dir, read-only.
func LoadEnrolments(dir string) ([]participants.Interval, error) {
	db, err := openStore(dir)
	if err != nil {
		return nil, err
	}
	defer db.Close()
	es, err := db.Enrolments("", "")
	if err != nil {
		return nil, fmt.Errorf("store %s: %w", dir, err)
	}
	out := make([]participants.Interval, len(es))
	for i, e := range es {
		out[i] = e.Interval()
	}
	return out, nil
}
