package tune

import (
	"errors"
	"fmt"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"

	"go.yaml.in/yaml/v3"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/profiles"
	"github.com/pulsefleet/pulsefleet/internal/yamlwalk"
)

// MaxPoints is the largest grid accepted (team choice: a sweep larger than
// this is more likely a typo than a plan, and its report is unreadable).
const MaxPoints = 10000

// DefaultGrace is the grace period after an event's end within which an
// alarm still detects it, when the grid sets none (team choice).
const DefaultGrace = 60 * time.Second

// AveragingKey is the grid file's top-level key for the estimator's
// averaging times, and the name of their column in summary.csv.
const AveragingKey = "averaging"

// Grid is a decoded tuning grid file.
type Grid struct {
	Base       *alarms.Profile
	BaseSource string // the base profile's file, built-in name, or "inline"
	// Sweep is the swept keys in file order. When the grid has averaging
	// times, Sweep[0] is them (Key AveragingKey, the values as written), so
	// they vary slowest; the profile keys follow.
	Sweep []Sweep
	// AveragingS is the averaging times in seconds, in file order; empty
	// when the grid has none (the trends are swept as recorded).
	AveragingS []float64
	Reference  Reference
	// Participants, when set (`participants: [..]`), limits the sweep to
	// these participants' history (ByParticipant) and adds alarms per
	// participant-day to the summary.
	Participants []string
	Text         []byte // the grid file as read (shown in the report)
}

// HasAveraging reports whether the grid sweeps averaging times, which
// need raw captures to re-run the estimator over.
func (g *Grid) HasAveraging() bool { return len(g.AveragingS) > 0 }

// isAveraging reports whether Sweep[k] is the averaging times.
func (g *Grid) isAveraging(k int) bool { return k == 0 && g.HasAveraging() }

// Sweep is one swept key and its values, written as in the profile file.
type Sweep struct {
	Key    string // CONDITION.KEY or CONDITION.escalate.KEY, as in the file
	Values []string
	lines  []int // line of each value in the grid file
}

// Reference says what a real event is: Rule when it is non-nil, the
// operators' reviews when Reviews is non-nil, else the annotated Events.
type Reference struct {
	Rule   *Rule
	File   string  // the events file, when the events came from one
	Events []Event // annotated events (File)
	// Reviews says which review labels count as real events (positive) and
	// which as alarms better avoided (negative); the reviewed episodes
	// themselves come from the store (LoadReviewed) into Reviewed before
	// the sweep runs.
	Reviews  *ReviewSets
	Reviewed []ReviewedEpisode
	// Grace extends an event's end for matching; zero means no grace (the
	// grid file's default is DefaultGrace).
	Grace time.Duration
	// Conditions names the scored conditions; empty means every spo2_low
	// condition of the base profile.
	Conditions []string
}

// Rule defines events as SpO2 below Below (%) for at least For.
type Rule struct {
	Below float64
	For   time.Duration
}

func (r Rule) String() string {
	return fmt.Sprintf("SpO2 < %s %% for at least %s", strconv.FormatFloat(r.Below, 'f', -1, 64), fmtDur(r.For))
}

// Event is one reference event of one device; times in seconds on the
// trend's clock (Unix seconds for a store, file seconds for a CSV).
type Event struct {
	Device     string
	Start, End float64
	Label      string
}

// Point is one grid point: its profile and the swept values that made it.
type Point struct {
	Index   int // 0-based, in cross-product order
	Name    string
	Values  []string // one per Grid.Sweep key
	Profile *alarms.Profile
	// AveragingS is the estimator averaging time the point's trends were
	// re-estimated with, s; 0 when the grid has no averaging times.
	AveragingS float64
	set        int // index into Grid.AveragingS (0 without)
}

// LoadGrid reads and validates a grid file; a relative base or reference
// file is resolved against the grid file's directory.
func LoadGrid(path string) (*Grid, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("load grid: %w", err)
	}
	g, err := ParseGrid(b, filepath.Dir(path))
	if err != nil {
		return nil, fmt.Errorf("grid %s: %w", path, err)
	}
	return g, nil
}

// ParseGrid decodes and validates a grid file. dir resolves relative file
// names. Every swept value is checked against the base profile's rules, and
// every grid point's profile is built and validated.
func ParseGrid(data []byte, dir string) (*Grid, error) {
	var root yaml.Node
	if err := yaml.Unmarshal(data, &root); err != nil {
		return nil, fmt.Errorf("parse grid: %w", err)
	}
	if root.Kind != yaml.DocumentNode || len(root.Content) == 0 {
		return nil, errors.New("parse grid: empty document, want base, sweep and reference")
	}
	g := &Grid{Text: append([]byte(nil), data...)}
	var refNode *yaml.Node
	var sweepNode *yaml.Node
	err := yamlwalk.Mapping(root.Content[0], "", func(key string, v *yaml.Node, path string) error {
		switch key {
		case "base":
			return g.decodeBase(v, dir)
		case "sweep":
			sweepNode = v
			return nil
		case "reference":
			refNode = v
			return nil
		case AveragingKey:
			return g.decodeAveraging(v)
		case "participants":
			return g.decodeParticipants(v, path)
		case "averaging_times", "estimator":
			return fmt.Errorf("%s (line %d): unknown key; averaging times are the top-level key %s: [4s, 8s, 12s]", path, v.Line, AveragingKey)
		}
		return fmt.Errorf("%s (line %d): unknown key, want base, sweep, reference, participants or %s", path, v.Line, AveragingKey)
	})
	if err != nil {
		return nil, err
	}
	if g.Base == nil {
		return nil, errors.New("base: missing, want a profile file or an inline profile")
	}
	switch {
	case sweepNode != nil:
		if err := g.decodeSweep(sweepNode); err != nil {
			return nil, err
		}
	case !g.HasAveraging():
		return nil, errors.New("sweep: missing, want CONDITION.KEY: [values...]")
	}
	if refNode == nil {
		return nil, errors.New("reference: missing, want rule: {below: 85, for: 60s}, file: events.csv or reviews: {positive: [actionable]}")
	}
	if err := g.decodeReference(refNode, dir); err != nil {
		return nil, err
	}
	if _, err := g.Points(); err != nil {
		return nil, err
	}
	return g, nil
}

func (g *Grid) decodeBase(v *yaml.Node, dir string) error {
	switch v.Kind {
	case yaml.ScalarNode:
		name := v.Value
		if name == "" {
			return fmt.Errorf("base (line %d): empty, want a profile file or an inline profile", v.Line)
		}
		path := name
		if !filepath.IsAbs(path) {
			path = filepath.Join(dir, path)
		}
		p, err := alarms.LoadProfile(path)
		if errors.Is(err, fs.ErrNotExist) {
			if bp, berr := profiles.Get(name); berr == nil {
				g.Base, g.BaseSource = bp, "built-in "+name
				return nil
			}
			return fmt.Errorf("base (line %d): %q: no such file and no built-in profile of that name (built-in: %s)",
				v.Line, name, strings.Join(profiles.Names(), ", "))
		}
		if err != nil {
			return fmt.Errorf("base: %w", err)
		}
		g.Base, g.BaseSource = p, name
		return nil
	case yaml.MappingNode:
		b, err := yaml.Marshal(v)
		if err != nil {
			return fmt.Errorf("base (line %d): %w", v.Line, err)
		}
		p, err := alarms.ParseProfile(b)
		if err != nil {
			var fe *alarms.FieldError
			if errors.As(err, &fe) {
				return fmt.Errorf("base.%s: %s (grid line %d)", fe.Path, fe.Msg, v.Line+max(fe.Line-1, 0))
			}
			return fmt.Errorf("base: %w", err)
		}
		g.Base, g.BaseSource = p, "inline"
		return nil
	}
	return fmt.Errorf("base (line %d): want a profile file name or an inline profile", v.Line)
}

func (g *Grid) decodeSweep(n *yaml.Node) error {
	err := yamlwalk.Mapping(n, "sweep", func(key string, v *yaml.Node, path string) error {
		head, _, _ := strings.Cut(key, ".")
		switch {
		case head == AveragingKey || head == "estimator" || strings.HasSuffix(key, "."+AveragingKey):
			return fmt.Errorf("%s (line %d): not a profile key; averaging times are the top-level key %s: [4s, 8s, 12s] beside base and sweep", path, v.Line, AveragingKey)
		case key == "name":
			return fmt.Errorf("%s (line %d): cannot be swept (grid points are named by tune)", path, v.Line)
		}
		if v.Kind != yaml.SequenceNode {
			return fmt.Errorf("%s (line %d): want a list of values like [86, 88, 90]", path, v.Line)
		}
		if len(v.Content) == 0 {
			return fmt.Errorf("%s (line %d): empty list, want at least one value", path, v.Line)
		}
		s := Sweep{Key: key}
		seen := map[string]int{}
		for i, vn := range v.Content {
			ip := fmt.Sprintf("%s[%d]", path, i)
			if vn.Kind != yaml.ScalarNode {
				return fmt.Errorf("%s (line %d): want a single value", ip, vn.Line)
			}
			val := strings.TrimSpace(vn.Value)
			if j, dup := seen[val]; dup {
				return fmt.Errorf("%s (line %d): %s repeats %s[%d]", ip, vn.Line, val, path, j)
			}
			seen[val] = i
			s.Values = append(s.Values, val)
			s.lines = append(s.lines, vn.Line)
		}
		g.Sweep = append(g.Sweep, s)
		return nil
	})
	if err != nil {
		return err
	}
	if len(g.Sweep) == 0 && !g.HasAveraging() {
		return errors.New("sweep: empty, want at least one CONDITION.KEY: [values...]")
	}
	n2 := 1
	for _, s := range g.Sweep {
		n2 *= len(s.Values)
		if n2 > MaxPoints {
			return fmt.Errorf("sweep: more than %d grid points, want at most %d", MaxPoints, MaxPoints)
		}
	}
	return nil
}

// decodeAveraging reads averaging: [4s, 8s, 12s]: the estimator's
// averaging window, each within its bounds, no value twice.
func (g *Grid) decodeAveraging(v *yaml.Node) error {
	if v.Kind != yaml.SequenceNode || len(v.Content) == 0 {
		return fmt.Errorf("%s (line %d): want a list of averaging times like [4s, 8s, 12s]", AveragingKey, v.Line)
	}
	s := Sweep{Key: AveragingKey}
	for i, vn := range v.Content {
		ip := fmt.Sprintf("%s[%d]", AveragingKey, i)
		val := strings.TrimSpace(vn.Value)
		d, err := time.ParseDuration(val)
		sec := d.Seconds()
		if vn.Kind != yaml.ScalarNode || err != nil || sec < estimator.MinAveragingS || sec > estimator.MaxAveragingS {
			return fmt.Errorf("%s (line %d): %q, want a duration in [%gs, %gs] (the estimator's averaging window) like 8s",
				ip, vn.Line, vn.Value, estimator.MinAveragingS, estimator.MaxAveragingS)
		}
		if j := slices.Index(g.AveragingS, sec); j >= 0 {
			return fmt.Errorf("%s (line %d): %s repeats %s[%d]", ip, vn.Line, val, AveragingKey, j)
		}
		g.AveragingS = append(g.AveragingS, sec)
		s.Values = append(s.Values, val)
		s.lines = append(s.lines, vn.Line)
	}
	g.Sweep = append([]Sweep{s}, g.Sweep...)
	return nil
}

// setError is a swept value that did not fit: Path is the profile key the
// profile rules rejected (the swept key itself, or another key the value
// made invalid).
type setError struct {
	Path, Msg string
}

// setValue sets one swept value. The value stays set when only the
// validation of the whole profile failed.
func setValue(p *alarms.Profile, key, val string) *setError {
	err := p.Set(key, val)
	if err == nil {
		return nil
	}
	var fe *alarms.FieldError
	if errors.As(err, &fe) {
		return &setError{Path: fe.Path, Msg: fe.Msg}
	}
	return &setError{Path: key, Msg: err.Error()}
}

func (g *Grid) decodeReference(n *yaml.Node, dir string) error {
	r := &g.Reference
	r.Grace = DefaultGrace
	err := yamlwalk.Mapping(n, "reference", func(key string, v *yaml.Node, path string) error {
		switch key {
		case "rule":
			rule, err := decodeRule(v, path)
			if err != nil {
				return err
			}
			r.Rule = rule
			return nil
		case "file":
			if v.Kind != yaml.ScalarNode || v.Value == "" {
				return fmt.Errorf("%s (line %d): want a CSV file name (device,start_s,end_s,label)", path, v.Line)
			}
			ev, err := readReferenceEvents(v, path, dir)
			if err != nil {
				return err
			}
			r.File, r.Events = v.Value, ev
			return nil
		case "grace":
			d, err := time.ParseDuration(strings.TrimSpace(v.Value))
			if v.Kind != yaml.ScalarNode || err != nil || d < 0 || d > time.Hour {
				return fmt.Errorf("%s (line %d): %q, want a duration in [0, 1h] like 60s", path, v.Line, v.Value)
			}
			r.Grace = d
			return nil
		case "conditions":
			if v.Kind != yaml.SequenceNode || len(v.Content) == 0 {
				return fmt.Errorf("%s (line %d): want a list of condition names like [spo2_low]", path, v.Line)
			}
			for i, cn := range v.Content {
				if g.Base.Condition(cn.Value) == nil {
					return fmt.Errorf("%s[%d] (line %d): %q, want a condition of the base profile %s", path, i, cn.Line, cn.Value, g.Base.Name)
				}
				r.Conditions = append(r.Conditions, cn.Value)
			}
			return nil
		case "reviews":
			rs, err := decodeReviewSets(v, path)
			if err != nil {
				return err
			}
			r.Reviews = rs
			return nil
		}
		return fmt.Errorf("%s (line %d): unknown key, want rule, file, reviews, grace or conditions", path, v.Line)
	})
	if err != nil {
		return err
	}
	switch n := btoi(r.Rule != nil) + btoi(r.File != "") + btoi(r.Reviews != nil); {
	case n == 0:
		return errors.New("reference: want rule: {below: 85, for: 60s}, file: events.csv or reviews: {positive: [actionable], negative: [not-actionable, artefact]}")
	case n > 1:
		return errors.New("reference: more than one of rule, file and reviews, want one of them")
	}
	if len(r.Conditions) == 0 {
		for _, c := range g.Base.Conditions {
			if c.Kind == alarms.SpO2Low {
				r.Conditions = append(r.Conditions, c.ConditionName())
			}
		}
		if len(r.Conditions) == 0 {
			return fmt.Errorf("reference.conditions: missing, and base profile %s has no spo2_low condition to score by default", g.Base.Name)
		}
	}
	return nil
}

// decodeRule decodes reference.rule: {below: SpO2, for: duration}, both
// required.
func decodeRule(v *yaml.Node, path string) (*Rule, error) {
	rule := &Rule{}
	var haveBelow, haveFor bool
	err := yamlwalk.Mapping(v, path, func(key string, v *yaml.Node, path string) error {
		switch key {
		case "below":
			f, err := strconv.ParseFloat(strings.TrimSpace(v.Value), 64)
			if v.Kind != yaml.ScalarNode || err != nil || !(f > 0 && f <= 100) {
				return fmt.Errorf("%s (line %d): %q, want an SpO2 in (0, 100]", path, v.Line, v.Value)
			}
			rule.Below, haveBelow = f, true
			return nil
		case "for":
			d, err := time.ParseDuration(strings.TrimSpace(v.Value))
			if v.Kind != yaml.ScalarNode || err != nil || d < 0 || d > 24*time.Hour {
				return fmt.Errorf("%s (line %d): %q, want a duration in [0, 24h] like 60s", path, v.Line, v.Value)
			}
			rule.For, haveFor = d, true
			return nil
		}
		return fmt.Errorf("%s (line %d): unknown key, want below or for", path, v.Line)
	})
	if err != nil {
		return nil, err
	}
	if !haveBelow || !haveFor {
		return nil, fmt.Errorf("%s (line %d): want both below and for, like {below: 85, for: 60s}", path, v.Line)
	}
	return rule, nil
}

// readReferenceEvents reads the events CSV that reference.file names
// (relative to dir, the grid file's directory).
func readReferenceEvents(v *yaml.Node, path, dir string) ([]Event, error) {
	p := v.Value
	if !filepath.IsAbs(p) {
		p = filepath.Join(dir, p)
	}
	f, err := os.Open(p)
	if err != nil {
		return nil, fmt.Errorf("%s (line %d): %w", path, v.Line, err)
	}
	defer f.Close()
	ev, err := ReadEventsCSV(f)
	if err != nil {
		return nil, fmt.Errorf("%s %s: %w", path, v.Value, err)
	}
	return ev, nil
}

// Size is the number of grid points.
func (g *Grid) Size() int {
	n := 1
	for _, s := range g.Sweep {
		n *= len(s.Values)
	}
	return n
}

// Points builds every grid point's profile (the base with each swept value
// set, validated), in cross-product order, the last key varying fastest.
func (g *Grid) Points() ([]Point, error) {
	n := g.Size()
	pts := make([]Point, n)
	width := len(strconv.Itoa(n))
	for i := range pts {
		p := g.Base.Clone()
		vals := make([]string, len(g.Sweep))
		rem := i
		for k := len(g.Sweep) - 1; k >= 0; k-- {
			s := g.Sweep[k]
			vals[k] = s.Values[rem%len(s.Values)]
			rem /= len(s.Values)
		}
		if err := g.apply(p, vals); err != nil {
			return nil, err
		}
		name := fmt.Sprintf("%s-g%0*d", g.Base.Name, width, i+1)
		if len(name) > 64 {
			name = fmt.Sprintf("g%0*d", width, i+1)
		}
		p.Name = name
		pts[i] = Point{Index: i, Name: name, Values: vals, Profile: p}
		if g.HasAveraging() {
			set := slices.Index(g.Sweep[0].Values, vals[0])
			pts[i].set, pts[i].AveragingS = set, g.AveragingS[set]
		}
	}
	return pts, nil
}

// apply sets every swept value of one grid point. Keys may depend on each
// other (a lower limit needs a lower escalation depth), so values that fail
// only because of another key are retried after the others are set; what
// still fails is reported as sweep.KEY[i]: the bound.
func (g *Grid) apply(p *alarms.Profile, vals []string) error {
	var pending []int
	for k := range g.Sweep {
		if !g.isAveraging(k) { // not a profile key
			pending = append(pending, k)
		}
	}
	errs := make([]*setError, len(g.Sweep))
	for len(pending) > 0 {
		var still []int
		for _, k := range pending {
			if errs[k] = setValue(p, g.Sweep[k].Key, vals[k]); errs[k] != nil {
				still = append(still, k)
			}
		}
		if len(still) == len(pending) {
			break
		}
		pending = still
	}
	if len(pending) == 0 {
		return nil
	}
	// Report a key whose own value is out of bounds first.
	k := pending[0]
	for _, j := range pending {
		if errs[j].Path == g.Sweep[j].Key {
			k = j
			break
		}
	}
	s, e := g.Sweep[k], errs[k]
	idx := slices.Index(s.Values, vals[k])
	msg := fmt.Sprintf("sweep.%s[%d]: %s", s.Key, idx, e.Msg)
	if e.Path != s.Key {
		msg = fmt.Sprintf("sweep.%s[%d]: %s makes %s: %s", s.Key, idx, vals[k], e.Path, e.Msg)
	}
	if idx < len(s.lines) && s.lines[idx] > 0 {
		msg += fmt.Sprintf(" (line %d)", s.lines[idx])
	}
	if len(g.Sweep) > 1 {
		msg += " in grid point " + describe(g.Sweep, vals)
	}
	return errors.New(msg)
}

func describe(sw []Sweep, vals []string) string {
	var b strings.Builder
	for k, s := range sw {
		if k > 0 {
			b.WriteString(", ")
		}
		b.WriteString(s.Key + "=" + vals[k])
	}
	return b.String()
}

func fmtDur(d time.Duration) string {
	if d%time.Second == 0 {
		return strconv.FormatInt(int64(d/time.Second), 10) + "s"
	}
	return d.String()
}

func finite(f float64) bool { return !math.IsNaN(f) && !math.IsInf(f, 0) }
