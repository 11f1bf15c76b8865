package profiles

import (
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"

	"github.com/pulsefleet/pulsefleet/alarms"
)

func TestBuiltinProfilesParse(t *testing.T) {
	names := Names()
	if strings.Join(names, ",") != "adult-ward-pilot,home-overnight" {
		t.Fatalf("Names() = %v", names)
	}
	for _, n := range names {
		p, err := Get(n)
		if err != nil {
			t.Fatal(err)
		}
		if p.Name != n {
			t.Errorf("%s: name %q, want the file name", n, p.Name)
		}
		// Marshal round trip keeps every value.
		b, err := p.Marshal()
		if err != nil {
			t.Fatal(err)
		}
		q, err := alarms.ParseProfile(b)
		if err != nil {
			t.Fatalf("%s: re-parse: %v\n%s", n, err, b)
		}
		b2, _ := q.Marshal()
		if string(b) != string(b2) {
			t.Errorf("%s: round trip differs:\n%s\n---\n%s", n, b, b2)
		}
	}
	if _, err := Get("icu"); err == nil {
		t.Error("Get(icu) succeeded, want an error naming the built-in profiles")
	}
}

// Every condition value carries a comment naming its source or "team
// choice", and every file carries the caution that settings are the
// clinical team's decision.
func TestBuiltinProfilesCiteEveryValue(t *testing.T) {
	// A named published source (listed in docs/references.md, "Alarm settings
	// in published practice") or the words "team choice". A priority's
	// meaning ("prompt response") or a pointer to a file is not a source.
	sources := []string{"team choice", "Welch 2011", "Taenzer 2010", "Lansdowne 2016", "BTS 2017", "AASM",
		"IEC 60601-1-8", "ISO 80601-2-61"}
	for _, n := range Names() {
		b, _ := Bytes(n)
		if !strings.Contains(string(b), "clinical team's decision") || !strings.Contains(string(b), caution.Comment) {
			t.Errorf("%s: missing the caution line %q or the clinical team's decision", n, caution.Comment)
		}
		var root yaml.Node
		if err := yaml.Unmarshal(b, &root); err != nil {
			t.Fatal(err)
		}
		var walk func(n *yaml.Node, path string)
		walk = func(node *yaml.Node, path string) {
			switch node.Kind {
			case yaml.DocumentNode, yaml.SequenceNode:
				for _, c := range node.Content {
					walk(c, path)
				}
			case yaml.MappingNode:
				for i := 0; i+1 < len(node.Content); i += 2 {
					k, v := node.Content[i], node.Content[i+1]
					p := path + "." + k.Value
					if v.Kind == yaml.ScalarNode && k.Value != "kind" && k.Value != "name" && k.Value != "description" {
						c := v.LineComment + k.LineComment
						ok := false
						for _, s := range sources {
							ok = ok || strings.Contains(c, s)
						}
						if !ok {
							t.Errorf("%s%s (line %d): comment %q names no source and no team choice", n, p, k.Line, c)
						}
						// IEC 60601-1-8 gives a priority's meaning, not which
						// condition gets it (docs/references.md, "Alarm
						// systems"): every priority is a team choice.
						if k.Value == "priority" && !strings.Contains(c, "team choice") {
							t.Errorf("%s%s (line %d): comment %q: a priority is a team choice", n, p, k.Line, c)
						}
					}
					walk(v, p)
				}
			}
		}
		walk(&root, "")
	}
}
