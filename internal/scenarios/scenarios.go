// Package scenarios holds the scenario files shipped with pulsefleet,
// embedded into the binary: `pulsefleet sim --scenario NAME` finds them by
// name (the file name without .yaml). The format is documented in
// docs/scenarios.md; every person, ward, hospital and home in them is
// invented.
package scenarios

import (
	"embed"
	"fmt"
	"io/fs"
	"os"
	"sort"
	"strings"

	"github.com/pulsefleet/pulsefleet/internal/sim/scenario"
)

//go:embed *.yaml
var files embed.FS

// Names lists the shipped scenarios, sorted.
func Names() []string {
	entries, _ := fs.ReadDir(files, ".")
	var names []string
	for _, e := range entries {
		names = append(names, strings.TrimSuffix(e.Name(), ".yaml"))
	}
	sort.Strings(names)
	return names
}

// Load returns a shipped scenario by name, or reads a scenario file when
// nameOrFile is not a shipped name.
func Load(nameOrFile string) (*scenario.Scenario, error) {
	if b, err := files.ReadFile(nameOrFile + ".yaml"); err == nil {
		sc, err := scenario.Parse(b)
		if err != nil {
			return nil, fmt.Errorf("shipped scenario %s: %w", nameOrFile, err)
		}
		return sc, nil
	}
	if _, err := os.Stat(nameOrFile); err != nil {
		return nil, fmt.Errorf("scenario %q is neither a shipped scenario (%s) nor a readable file: %w",
			nameOrFile, strings.Join(Names(), ", "), err)
	}
	return scenario.ParseFile(nameOrFile)
}
