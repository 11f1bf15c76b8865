// Package yamlwalk walks the YAML files pulsefleet reads by hand (alarm
// profiles, tuning grids, scenarios) so that every one of them rejects what
// it does not know the same way: a mapping where one is wanted, no key
// twice, and errors that name the key path ("conditions[0].delay") and the
// line.
package yamlwalk
