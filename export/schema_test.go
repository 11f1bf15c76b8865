package export

import (
	"os"
	"strings"
	"sync"
	"testing"

	"github.com/santhosh-tekuri/jsonschema/v6"
)

var schemaCache sync.Map // path -> *jsonschema.Schema

// compileFHIRSchema compiles the FHIR R4 JSON schema (draft-06) once per path.
func compileFHIRSchema(t testing.TB, path string) *jsonschema.Schema {
	t.Helper()
	if s, ok := schemaCache.Load(path); ok {
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
	schemaCache.Store(path, s)
	return s
}

func validateJSON(s *jsonschema.Schema, doc string) error {
	v, err := jsonschema.UnmarshalJSON(strings.NewReader(doc))
	if err != nil {
		return err
	}
	return s.Validate(v)
}
