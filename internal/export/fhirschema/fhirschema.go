// Package fhirschema loads the official HL7 FHIR R4 JSON schema that
// .ci/deps.d/fhir-schema.sh installs and validates documents against it. It
// is test support: the export tests and the command tests validate every
// FHIR Bundle pulsefleet writes (offline and through a gateway) with it.
package fhirschema

import (
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"sync"
	"testing"

	"github.com/santhosh-tekuri/jsonschema/v6"
)

var cache sync.Map // path -> *jsonschema.Schema

// Path returns the schema file: $PULSEFLEET_FHIR_SCHEMA, else the copy
// under the repository's .cache/. Without it the test is skipped, or fails
// when PULSEFLEET_REQUIRE_TOOLS is set (as in CI).
func Path(t testing.TB) string {
	t.Helper()
	p := os.Getenv("PULSEFLEET_FHIR_SCHEMA")
	if p == "" {
		_, here, _, _ := runtime.Caller(0)
		root := filepath.Join(filepath.Dir(here), "..", "..", "..")
		p = filepath.Join(root, ".cache", "node_modules", "@asymmetrik", "fhir-json-schema-validator", "fhir.schema.json")
	}
	if _, err := os.Stat(p); err != nil {
		msg := "FHIR R4 JSON schema not found (" + err.Error() + "); run .ci/deps.d/fhir-schema.sh"
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatal(msg)
		}
		t.Skip(msg)
	}
	return p
}

// Compile compiles the FHIR R4 JSON schema (draft-06) at path once.
func Compile(t testing.TB, path string) *jsonschema.Schema {
	t.Helper()
	if s, ok := cache.Load(path); ok {
		return s.(*jsonschema.Schema)
	}
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	doc, err := jsonschema.UnmarshalJSON(f)
	if err != nil {
		t.Fatalf("schema %s: %v", path, err)
	}
	// The right file: HL7's FHIR R4 schema (draft-06, id .../json-schema/4.0),
	// not an STU3 or R5 one.
	if m, ok := doc.(map[string]any); !ok || m["id"] != "http://hl7.org/fhir/json-schema/4.0" || m["$schema"] != "http://json-schema.org/draft-06/schema#" {
		t.Fatalf("%s is not the FHIR R4 JSON schema (id %v, $schema %v)", path, m["id"], m["$schema"])
	}
	c := jsonschema.NewCompiler()
	const url = "https://schema.pulsefleet.invalid/fhir.schema.json"
	if err := c.AddResource(url, doc); err != nil {
		t.Fatal(err)
	}
	s, err := c.Compile(url)
	if err != nil {
		t.Fatalf("compile FHIR schema: %v", err)
	}
	cache.Store(path, s)
	return s
}

// Validate validates one JSON document against s.
func Validate(s *jsonschema.Schema, doc string) error {
	v, err := jsonschema.UnmarshalJSON(strings.NewReader(doc))
	if err != nil {
		return err
	}
	return s.Validate(v)
}
