// Package caution holds the one caution text that every pulsefleet output a
// person may keep or forward carries: command output, files (CSV, YAML,
// JSON, SVG, HTML), the web pages, the serve start-up lines and the FHIR
// export.
//
// pulsefleet is a research and engineering tool for pilots of prototype
// pulse oximeters. It is not a certified medical alarm or medical device,
// and its output must not be mistaken for one: a file copied out of a pilot
// should say so on its own, without the program beside it.
//
// How the text travels depends on the format (docs/contracts.md, "The
// caution on every output"): a '#' comment line at the top of CSV and YAML
// files (every pulsefleet reader of those files skips such lines), a
// "caution" field in JSON, a note in SVG and HTML, and an annotation on
// every FHIR Observation.
package caution
