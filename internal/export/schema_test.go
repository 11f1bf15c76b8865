package export

import (
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/export/fhirschema"
	"github.com/santhosh-tekuri/jsonschema/v6"
)

func compileFHIRSchema(t testing.TB, path string) *jsonschema.Schema {
	return fhirschema.Compile(t, path)
}

func fhirSchemaPath(t testing.TB) string { return fhirschema.Path(t) }

func validateJSON(s *jsonschema.Schema, doc string) error { return fhirschema.Validate(s, doc) }
