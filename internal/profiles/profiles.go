// Package profiles ships pulsefleet's default alarm profiles inside the
// binary: adult-ward-pilot (adult general ward) and home-overnight
// (overnight at home). Each value in the YAML files names its published
// source or says "team choice". They are starting points: the settings are
// the clinical team's decision.
package profiles

import (
	"embed"
	"fmt"
	"io/fs"
	"sort"
	"strings"

	"github.com/pulsefleet/pulsefleet/alarms"
)

//go:embed *.yaml
var files embed.FS

// Names lists the embedded profiles, sorted.
func Names() []string {
	ents, _ := fs.ReadDir(files, ".")
	var out []string
	for _, e := range ents {
		out = append(out, strings.TrimSuffix(e.Name(), ".yaml"))
	}
	sort.Strings(out)
	return out
}

// Bytes returns the YAML file of an embedded profile, comments included.
func Bytes(name string) ([]byte, error) {
	b, err := files.ReadFile(name + ".yaml")
	if err != nil {
		return nil, fmt.Errorf("no built-in profile %q (have %s)", name, strings.Join(Names(), ", "))
	}
	return b, nil
}

// Get parses an embedded profile.
func Get(name string) (*alarms.Profile, error) {
	b, err := Bytes(name)
	if err != nil {
		return nil, err
	}
	p, err := alarms.ParseProfile(b)
	if err != nil {
		return nil, fmt.Errorf("built-in profile %s: %w", name, err)
	}
	return p, nil
}
