package alarms

import (
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"
)

const contractProfile = `name: adult-ward-pilot
conditions:
  - kind: spo2_low        # the example of docs/contracts.md
    limit: 90
    hysteresis: 2
    delay: 15s
    priority: medium
    escalate: {below: 85, after: 60s, priority: high}
`

func TestParseProfileContractExample(t *testing.T) {
	p := mustProfile(t, contractProfile)
	want := &Profile{Name: "adult-ward-pilot", Conditions: []Condition{{Kind: SpO2Low, Limit: 90, Hysteresis: 2,
		Delay: 15 * time.Second, Priority: PriorityMedium,
		Escalate: &Escalation{Below: 85, After: 60 * time.Second, Priority: PriorityHigh}}}}
	if !reflect.DeepEqual(p, want) {
		t.Fatalf("parsed %+v\nwant %+v", p, want)
	}
	b, err := p.Marshal()
	if err != nil {
		t.Fatal(err)
	}
	if q := mustProfile(t, string(b)); !reflect.DeepEqual(q, p) {
		t.Errorf("Marshal round trip: %+v\n%s", q, b)
	}
}

// Unknown keys and bad values give an error naming the key path and the bound.
func TestParseProfileErrors(t *testing.T) {
	cond := func(body string) string { return "name: x\nconditions:\n  - " + body + "\n" }
	for _, tc := range []struct{ in, want string }{
		{cond("{kind: spo2_low, limit: 90, delay: -5s, priority: low}"), "conditions[0].delay: -5s, want >= 0"},
		{cond("{kind: spo2_low, limit: 90, delay: 11m, priority: low}"), "conditions[0].delay: 11m0s, want <= 10m0s"},
		{cond("{kind: spo2_low, limit: 90, delay: 15, priority: low}"), `conditions[0].delay: "15", want a duration like 15s`},
		{cond("{kind: spo2_low, limit: 101, delay: 0s, priority: low}"), "conditions[0].limit: 101, want in [50, 100] for spo2_low"},
		{cond("{kind: spo2_low, limit: 90, hysteresis: -1, delay: 0s, priority: low}"), "conditions[0].hysteresis: -1, want in [0, 10]"},
		{cond("{kind: spo2_low, limit: 90, delay: 0s, priority: urgent}"), `conditions[0].priority: "urgent", want low, medium or high`},
		{cond("{kind: spo2_low, limit: 90, delay: 0s}"), "conditions[0].priority: missing"},
		{cond("{kind: spo2_lo, limit: 90, delay: 0s, priority: low}"), `conditions[0].kind: kind "spo2_lo", want one of`},
		{cond("{limit: 90, delay: 0s, priority: low}"), "conditions[0].kind: missing"},
		{cond("{kind: spo2_low, limit: 90, delay: 0s, priority: low, colour: red}"), "conditions[0].colour: unknown key"},
		{cond("{kind: spo2_low, limit: 90, delay: 0s, priority: low, escalate: {below: 85, when: 1}}"), "conditions[0].escalate.when: unknown key"},
		{cond("{kind: spo2_low, limit: 90, delay: 0s, priority: medium, escalate: {below: 85, priority: low}}"), "conditions[0].escalate.priority: low, want above the condition's priority medium"},
		{cond("{kind: spo2_low, limit: 90, delay: 0s, priority: low, escalate: {below: 92, priority: high}}"), "conditions[0].escalate.below: 92, want in (0, 90)"},
		{cond("{kind: spo2_low, limit: 90, delay: 0s, priority: low, escalate: {priority: high}}"), "conditions[0].escalate: no rule"},
		{cond("{kind: pulse_high, limit: 120, delay: 0s, priority: low, escalate: {below: 85, priority: high}}"), "conditions[0].escalate.below: 85, pulse_high escalates above a value"},
		{cond("{kind: signal_lost, limit: 1, delay: 0s, priority: low}"), "conditions[0].limit: 1, not used by signal_lost"},
		{cond("{kind: spo2_low, limit: 90, delay: 0s, priority: low, baseline: 60s}"), "conditions[0].baseline: 1m0s, used only by desaturation"},
		{cond("{kind: desaturation, limit: 3, hysteresis: 4, delay: 0s, priority: low}"), "conditions[0].hysteresis: 4, want in [0, 3]"},
		{cond("{kind: spo2_low, limit: .nan, delay: 0s, priority: low}"), `conditions[0].limit: ".nan", want a finite number`},
		{"name: x\nconditions:\n  - {kind: spo2_low, limit: 90, delay: 0s, priority: low}\n  - {kind: spo2_low, limit: 85, delay: 0s, priority: high}\n", `conditions[1].name: "spo2_low" already used by conditions[0]`},
		{"name: x\nconditions: []\n", "conditions: empty"},
		{"name: X Y\nconditions: []\n", `name: "X Y" has 'X'`},
		{"conditions:\n  - {kind: spo2_low, limit: 90, delay: 0s, priority: low}\n", "name: length 0, want 1..64"},
		{"name: x\nname: y\n", "name: duplicate key"},
		{"name: x\npause_max: 2h\nconditions:\n  - {kind: spo2_low, limit: 90, delay: 0s, priority: low}\n", "pause_max: 2h0m0s, want in (0, 1h]"},
		{"name: x\nextra: 1\n", "extra: unknown key (line 2)"},
		{"- a\n", "(document): want a mapping"},
		{"", "empty document"},
	} {
		_, err := ParseProfile([]byte(tc.in))
		if err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("ParseProfile(%q)\n error %v\n want it to contain %q", tc.in, err, tc.want)
		}
	}
}

// Two conditions of one kind are told apart by name; Set addresses values
// the way a tuning grid sweeps them (docs/contracts.md, "Tuning grid file": CONDITION.KEY).
func TestProfileSet(t *testing.T) {
	p := mustProfile(t, contractProfile+"  - {kind: spo2_low, name: spo2_deep, limit: 80, delay: 0s, priority: high}\n")
	q := p.Clone()
	for _, kv := range [][2]string{{"spo2_low.limit", "88"}, {"spo2_low.delay", "30s"}, {"spo2_low.hysteresis", "1"},
		{"spo2_low.escalate.after", "120s"}, {"spo2_deep.limit", "78"}, {"pause_max", "5m"}} {
		if err := q.Set(kv[0], kv[1]); err != nil {
			t.Fatalf("Set(%s, %s): %v", kv[0], kv[1], err)
		}
	}
	c := q.Condition("spo2_low")
	if c.Limit != 88 || c.Delay != 30*time.Second || c.Hysteresis != 1 || c.Escalate.After != 120*time.Second ||
		q.Condition("spo2_deep").Limit != 78 || q.PauseMax != 5*time.Minute {
		t.Errorf("after Set: %+v", q)
	}
	if p.Condition("spo2_low").Limit != 90 || p.Condition("spo2_low").Escalate.After != 60*time.Second {
		t.Error("Set on a Clone changed the original")
	}
	for _, tc := range [][3]string{
		{"spo2_low.delay", "-5s", "spo2_low.delay: -5s, want >= 0"},
		{"spo2_low.limit", "abc", `spo2_low.limit: "abc", want a finite number`},
		{"pulse_low.limit", "40", `no condition named "pulse_low"`},
		{"spo2_low.colour", "red", "spo2_low.colour: unknown key"},
		{"spo2_low.kind", "pulse_low", "cannot be swept"},
	} {
		err := p.Clone().Set(tc[0], tc[1])
		if err == nil || !strings.Contains(err.Error(), tc[2]) {
			t.Errorf("Set(%s, %s) = %v, want %q", tc[0], tc[1], err, tc[2])
		}
	}
}

func FuzzParseProfile(f *testing.F) {
	f.Add([]byte(contractProfile))
	f.Add([]byte(benchProfileFull))
	for _, name := range []string{"ward-replay.yaml", "desat-replay.yaml"} {
		if b, err := os.ReadFile(filepath.Join("testdata", name)); err == nil {
			f.Add(b)
		}
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		p, err := ParseProfile(data)
		if err != nil {
			return
		}
		// Anything accepted survives a Marshal round trip and compiles.
		b, err := p.Marshal()
		if err != nil {
			t.Fatal(err)
		}
		q, err := ParseProfile(b)
		if err != nil {
			t.Fatalf("re-parse of accepted profile: %v\n%s", err, b)
		}
		if !reflect.DeepEqual(p, q) {
			t.Fatalf("round trip changed the profile\n%+v\n%+v", p, q)
		}
		if _, err := NewEngine(p, "f"); err != nil {
			t.Fatal(err)
		}
	})
}

func FuzzReadTrendCSV(f *testing.F) {
	for _, name := range []string{"ward-replay.csv", "desat-replay.csv"} {
		if b, err := os.ReadFile(filepath.Join("testdata", name)); err == nil {
			f.Add(b)
		}
	}
	f.Add([]byte("t_s,spo2_pct\n0,95\n1,\n"))
	p := &Profile{Name: "f", Conditions: []Condition{{Kind: SpO2Low, Limit: 90, Delay: 5 * time.Second, Priority: PriorityLow}}}
	f.Fuzz(func(t *testing.T, data []byte) {
		trends, err := ReadTrendCSV(strings.NewReader(string(data)))
		if err != nil {
			return
		}
		if _, err := ReplayTrends(p, trends); err != nil {
			t.Fatal(err)
		}
	})
}
