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
