package main

import (
	"errors"
	"fmt"
	"reflect"
	"regexp"
	"strings"

	"go.yaml.in/yaml/v3"
)

// serveConfigKeys lists the YAML keys --config accepts, in struct order.
func serveConfigKeys() []string {
	return yamlKeys(reflect.TypeOf(serveConfig{}))
}

// yamlKeys lists a struct's YAML keys, those of inline fields included.
func yamlKeys(t reflect.Type) []string {
	keys := make([]string, 0, t.NumField())
	for i := 0; i < t.NumField(); i++ {
		k, opts, _ := strings.Cut(t.Field(i).Tag.Get("yaml"), ",")
		if k == "" && opts == "inline" {
			keys = append(keys, yamlKeys(t.Field(i).Type)...)
		} else if k != "" && k != "-" {
			keys = append(keys, k)
		}
	}
	return keys
}

var (
	yamlUnknownField = regexp.MustCompile(`^line (\d+): field (.+) not found in type \S+$`)
	yamlBadValue     = regexp.MustCompile("^line (\\d+): cannot unmarshal !!\\w+ `(.*)` into (\\S+)$")
)

// yamlWant says in words what a Go type of serveConfig wants.
var yamlWant = map[string]string{
	"time.Duration": "a duration such as 90s, 5m or 1h30m",
	"int":           "a whole number",
	"bool":          "true or false",
	"string":        "text",
	"[]string":      "a list of text",
}

// configError rewrites the YAML decoder's errors into sentences that name
// the key and the expected keys or format, never a Go type.
func configError(path string, err error) error {
	var te *yaml.TypeError
	if !errors.As(err, &te) {
		return fmt.Errorf("config %s: %w", path, err)
	}
	msgs := make([]string, 0, len(te.Errors))
	for _, e := range te.Errors {
		if m := yamlUnknownField.FindStringSubmatch(e); m != nil {
			msgs = append(msgs, fmt.Sprintf("line %s: unknown key %q, want one of %s", m[1], m[2], strings.Join(serveConfigKeys(), ", ")))
			continue
		}
		if m := yamlBadValue.FindStringSubmatch(e); m != nil {
			want, ok := yamlWant[m[3]]
			if !ok {
				want = "a value of another kind"
			}
			msgs = append(msgs, fmt.Sprintf("line %s: value %q, want %s", m[1], m[2], want))
			continue
		}
		msgs = append(msgs, e)
	}
	return fmt.Errorf("config %s: %s", path, strings.Join(msgs, "; "))
}
