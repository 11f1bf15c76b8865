package yamlwalk

import (
	"errors"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"
)

func doc(t *testing.T, src string) *yaml.Node {
	t.Helper()
	var n yaml.Node
	if err := yaml.Unmarshal([]byte(src), &n); err != nil {
		t.Fatal(err)
	}
	return n.Content[0]
}

// The walk visits keys in file order with their paths; errors name the path
// and the line (the lines are counted in the literal documents below).
func TestMapping(t *testing.T) {
	var got []string
	n := doc(t, "a: 1\nb:\n  c: 2\n")
	err := Mapping(n, "", func(key string, v *yaml.Node, path string) error {
		got = append(got, path)
		if key == "b" {
			return Mapping(v, path, func(_ string, _ *yaml.Node, path string) error {
				got = append(got, path)
				return nil
			})
		}
		return nil
	})
	if err != nil || strings.Join(got, " ") != "a b b.c" {
		t.Fatalf("walk: %v %v, want a b b.c", got, err)
	}

	for _, c := range []struct{ src, want string }{
		{"- a\n", "(document): want a mapping (line 1)"},
		{"a: 1\nb: 2\na: 3\n", "a: duplicate key (line 3)"},
		{"a: 1\nzz: 2\n", "zz: unknown key (line 2)"},
	} {
		err := Mapping(doc(t, c.src), "", func(key string, v *yaml.Node, path string) error {
			if key == "zz" {
				return Errorf(path, "unknown key")
			}
			return nil
		})
		var e *Error
		if !errors.As(err, &e) || err.Error() != c.want {
			t.Errorf("%q: %v, want %q", c.src, err, c.want)
		}
	}
	if err := Mapping(doc(t, "x: [1]\n"), "top", func(string, *yaml.Node, string) error {
		return errors.New("plain")
	}); err == nil || err.Error() != "plain" {
		t.Errorf("a plain error from fn: %v, want it unchanged", err)
	}
	if k := Key(doc(t, "a: 1\nb: 2\n"), "b"); k == nil || k.Line != 2 {
		t.Errorf("Key b: %+v, want line 2", k)
	}
}
